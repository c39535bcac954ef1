"""The one rule for writing quantities for people, shared by the SDK's command-line
tools and the ``keystrata`` command (``keystrata.cli.units`` builds on it).

Amounts in bits with SI prefixes and three significant digits (``850 bit``,
``12.3 kbit``, ``1.05 Mbit``; k = 1000, as SI prefixes are used for bits, IEC 80000-13:
common practice for data rates), durations in their two largest units (``3 min 20 s``).
"""

from __future__ import annotations

import math

__all__ = ["NONE", "duration", "si"]

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
