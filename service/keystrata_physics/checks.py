"""The number checks every module of the link model shares: a ``ValueError`` that names
the parameter, for booleans, non-numbers, NaN and infinities."""

from __future__ import annotations

import math


def number(name: str, value: float) -> float:
    """``value`` as a float, if it is a finite real number (not a bool)."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ValueError(f"{name} must be a number, got {value!r}")
    if not math.isfinite(value):
        raise ValueError(f"{name} must be finite, got {value!r}")
    return float(value)


def positive(name: str, value: float) -> float:
    """``value`` as a float, if it is a finite number above 0."""
    checked = number(name, value)
    if checked <= 0.0:
        raise ValueError(f"{name} must be > 0, got {value!r}")
    return checked
