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

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, TypeVar

import click

from keystrata_client._units import NONE, duration, si

F = TypeVar("F", bound=Callable[..., Any])

#: The SI and time-span rule itself lives in the SDK, so that its command-line tools
#: (keystrata-encryptors) write figures the same way.
__all__ = ["HUMAN", "NONE", "Units", "duration", "exact_option", "si"]


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
