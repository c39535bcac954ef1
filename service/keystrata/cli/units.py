"""The one way the CLI's screens write quantities: bits, rates, durations, counts.

By default figures are for people: amounts of key in bits with SI prefixes and three
significant digits (``850 bit``, ``12.3 kbit``, ``1.05 Mbit``; k = 1000, as SI prefixes
are used for bits, IEC 80000-13: common practice for data rates), rates the same with
``/s`` (``320 kbit/s``), durations in their two largest units (``3 min 20 s``,
``2 h 5 min``, ``4 d 3 h``), counts with thousands separators (``1,234``). With
``--exact`` amounts and rates are whole bits with separators (``1,048,576 bit``) and
durations whole seconds (``200 s``); ``--json`` always carries the node's exact numbers.

Column headers are words (``ready``, ``relay rate``), never field names.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, TypeVar

import click

F = TypeVar("F", bound=Callable[..., Any])

#: What an absent figure looks like in every table.
NONE = "-"
_PREFIXES = ((1e12, "T"), (1e9, "G"), (1e6, "M"), (1e3, "k"))
_SPANS = (("d", 86_400), ("h", 3_600), ("min", 60), ("s", 1))


def si(value: float | None, unit: str) -> str:
    """``value`` with an SI prefix and three significant digits: ``1.05 Mbit``.

    Figures below 1000 keep their unit (``850 bit``, ``0.5 bit``); a prefix is chosen so
    that the figure shown is at least 1 (``999,999`` is ``1.00 Mbit`` after rounding).
    """
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return NONE
    size = abs(value)
    for factor, prefix in _PREFIXES:
        if size >= factor * 0.9995:  # 999,950 rounds to 1.00 M, not 1e+03 k
            return f"{_digits(value / factor)} {prefix}{unit}"
    if value == int(value):
        return f"{int(value)} {unit}"
    return f"{_digits(value)} {unit}"


def _digits(x: float) -> str:
    """Three significant digits, without an exponent: 1.05, 12.3, 850, 0.5."""
    size = abs(x)
    if size >= 99.95:
        return f"{x:.0f}"
    if size >= 9.995:
        return f"{x:.1f}"
    if size >= 0.9995:
        return f"{x:.2f}"
    return f"{x:.3g}"


def duration(seconds: float | None) -> str:
    """A time span in its two largest units: ``3 min 20 s``, ``2 h 5 min``, ``45 s``,
    ``0.4 s`` (the smaller unit is cut, not rounded: 2 h 5 min 59 s is ``2 h 5 min``)."""
    if seconds is None or not math.isfinite(seconds):
        return NONE
    if seconds < 0:
        return "-" + duration(-seconds)
    if seconds < 10 and seconds != int(seconds):
        return f"{seconds:.2g} s"
    left = round(seconds)
    for i, (name, size) in enumerate(_SPANS):
        if left >= size or size == 1:
            big, rest = divmod(left, size)
            if i + 1 == len(_SPANS):
                return f"{big} {name}"
            small_name, small_size = _SPANS[i + 1]
            small = rest // small_size
            return f"{big} {name}" + (f" {small} {small_name}" if small else "")
    return NONE  # not reached: the last span is 1 s


@dataclass(frozen=True, slots=True)
class Units:
    """How one screen writes its figures: for people, or exact (``--exact``)."""

    exact: bool = False

    def bits(self, value: float | None) -> str:
        """An amount of key, ``1.05 Mbit`` (exact: ``1,048,576 bit``)."""
        if value is None:
            return NONE
        return f"{value:,.0f} bit" if self.exact else si(value, "bit")

    def rate(self, value: float | None) -> str:
        """A rate of key, ``1.05 Mbit/s`` (exact: ``1,048,576 bit/s``)."""
        if value is None:
            return NONE
        return f"{value:,.0f} bit/s" if self.exact else si(value, "bit/s")

    def duration(self, seconds: float | None) -> str:
        """A time span, ``3 min 20 s`` (exact: ``200 s``)."""
        if seconds is None:
            return NONE
        return f"{seconds:,.0f} s" if self.exact else duration(seconds)

    def count(self, value: int | None) -> str:
        """A count of things (keys, requests): ``1,234`` in both modes."""
        return NONE if value is None else f"{value:,}"

    def share(self, ratio: float | None) -> str:
        """A ratio as a percentage: ``95 %``."""
        return NONE if ratio is None else f"{100 * ratio:.0f} %"

    def keys_and_bits(self, counts: dict[str, int]) -> str:
        """``{"keys", "bits"}`` as ``12 keys (3.07 kbit)``."""
        keys = counts["keys"]
        return f"{keys:,} {'key' if keys == 1 else 'keys'} ({self.bits(counts['bits'])})"

    def field(self, name: str, value: Any) -> str:
        """A registry or answer field by its name's unit suffix (``_bits``, ``_bps``,
        ``_seconds``), else the value as text."""
        if isinstance(value, bool) or not isinstance(value, int | float):
            return str(value)
        if name.endswith("_bits"):
            return self.bits(value)
        if name.endswith(("_bps", "_bits_per_second")):
            return self.rate(value)
        if name.endswith(("_seconds", "_s")):
            return self.duration(value)
        return f"{value:,}" if isinstance(value, int) else f"{value:g}"


def exact_option(f: F) -> F:
    """``--exact``: whole bits and seconds instead of human units."""
    return click.option(
        "--exact",
        is_flag=True,
        help="Show whole bits and seconds instead of human units (kbit, Mbit, min, h).",
    )(f)


#: The human units every screen uses unless asked for --exact.
HUMAN = Units()
