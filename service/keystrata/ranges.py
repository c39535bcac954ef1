"""Byte ranges of named buffers, as plain arithmetic.

A link key block and a pair key segment are both consumed from the front, so both are
addressed the same way: bytes [offset, offset + length) of a buffer named by its ID.
The wire names of the two kinds (``block`` and ``segment``, in
:class:`keystrata.peering.messages.LinkRange` and ``SegmentRange``) are the messages'
business; this module holds the one model and what is computed on it.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Range:
    """Bytes [offset, offset + length) of the buffer ``buffer_id``."""

    buffer_id: str
    offset: int
    length: int


@dataclass(frozen=True, slots=True)
class Available:
    """What a link block still holds: bytes [used, length), and its epsilon."""

    buffer_id: str
    used: int
    length: int
    epsilon: float


def take_ranges(buffers: Iterable[Available], n: int) -> list[Range]:
    """Return ranges covering the next ``n`` bytes of ``buffers`` in the given order.

    Raises:
        ValueError: the buffers hold fewer than ``n`` bytes.
    """
    out: list[Range] = []
    need = n
    for b in buffers:
        if need == 0:
            break
        free = b.length - b.used
        if free <= 0:
            continue
        step = min(free, need)
        out.append(Range(b.buffer_id, b.used, step))
        need -= step
    if need:
        raise ValueError(f"link holds {n - need} of the {n} bytes asked for")
    return out


def split_after(ranges: Sequence[Range], n: int) -> tuple[list[Range], list[Range]]:
    """Split ranges covering some bytes into the first ``n`` bytes and the rest."""
    first: list[Range] = []
    rest: list[Range] = []
    left = n
    for r in ranges:
        if left >= r.length:
            first.append(r)
            left -= r.length
        elif left > 0:
            first.append(Range(r.buffer_id, r.offset, left))
            rest.append(Range(r.buffer_id, r.offset + left, r.length - left))
            left = 0
        else:
            rest.append(r)
    return first, rest


def total(ranges: Iterable[Range]) -> int:
    """Bytes the ranges cover together."""
    return sum(r.length for r in ranges)
