"""Taking bytes from the front of a sealed buffer: the one way link key blocks and pair
key segments are consumed.

A buffer's row holds its consumption point ``used`` and its remaining bytes
[used, length), sealed under a context that includes ``used`` (storage/sealed.py). A
range is taken only where consumption stands (``offset == used``): a range ahead of it
waits for an earlier one not applied here yet, a range behind it would use bytes twice.
The bytes are opened once however many ranges are taken, and what is left is sealed
again under its new offset (or dropped when nothing is left), so the taken bytes are
gone once the caller's transaction commits.

Callers read and lock the rows and write back ``used`` and the re-sealed rest; they say
which errors a misplaced range raises (:class:`Refusals`), as the peer protocol answers
them differently for link blocks and for segments.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from functools import partial
from typing import Protocol

from keystrata.crypto.hazmat import Keyring
from keystrata.ranges import Range
from keystrata.storage.models import PairSegment
from keystrata.storage.sealed import SegmentRow, block_context, segment_context

#: The error to raise for a range, given the buffer's consumption point.
ErrorFor = Callable[[Range, int], Exception]


@dataclass(frozen=True)
class Refusals:
    """What a caller raises for a range that is not at the front of its buffer."""

    ahead: ErrorFor  # starts past ``used``: an earlier range is not applied here yet
    behind: ErrorFor  # starts before ``used``: those bytes were taken already
    outside: ErrorFor  # empty, or reaches past the buffer's end


def _not_at_front(r: Range, used: int) -> Exception:
    return AssertionError(f"range at {r.offset} of a buffer locked at {used}")


#: For ranges computed from the locked rows themselves: a misplaced one is a bug.
LOCKED = Refusals(ahead=_not_at_front, behind=_not_at_front, outside=_not_at_front)


class Front:
    """One sealed buffer, opened on the first take, taken from the front."""

    def __init__(
        self,
        keyring: Keyring,
        sealed: bytes | None,
        *,
        used: int,
        length: int,
        context: Callable[[int], bytes],
        refusals: Refusals,
    ) -> None:
        self._keyring = keyring
        self._sealed = sealed
        self._context = context
        self._refusals = refusals
        self._rest: bytes | None = None
        self.used = used
        self.length = length

    def take(self, r: Range) -> bytes:
        """The bytes of ``r``, which must start at the front.

        Raises:
            The error :class:`Refusals` names for a misplaced range (nothing is taken);
            SealBroken when the sealed bytes do not open under their context.
        """
        if r.offset > self.used:
            raise self._refusals.ahead(r, self.used)
        if r.offset < self.used:
            raise self._refusals.behind(r, self.used)
        if r.length <= 0 or r.offset + r.length > self.length:
            raise self._refusals.outside(r, self.used)
        if self._rest is None:
            assert self._sealed is not None, "a buffer with bytes left holds them sealed"
            self._rest = self._keyring.open(self._sealed, self._context(self.used))
        taken, self._rest = self._rest[: r.length], self._rest[r.length :]
        self.used += r.length
        return taken

    def sealed_rest(self) -> bytes | None:
        """What is left, sealed under its new offset ``used``; None when nothing is."""
        if self._rest is None:
            return self._sealed
        return self._keyring.seal(self._rest, self._context(self.used)) if self._rest else None


def block_front(
    keyring: Keyring,
    link_id: str,
    block_id: str,
    *,
    sealed: bytes,
    used: int,
    length: int,
    refusals: Refusals,
) -> Front:
    """The front of link key block ``block_id`` of ``link_id``."""
    return Front(
        keyring,
        sealed,
        used=used,
        length=length,
        context=partial(block_context, link_id, block_id),
        refusals=refusals,
    )


class SealedSegment(SegmentRow, Protocol):
    """A pair key segment's row as far as its front needs it (the ORM row, or the
    same columns read with a Core statement)."""

    used: int
    sealed: bytes | None


def segment_front(keyring: Keyring, row: SealedSegment, refusals: Refusals) -> Front:
    """The front of a pair key segment's row."""
    return Front(
        keyring,
        row.sealed,
        used=row.used,
        length=row.length,
        context=partial(segment_context, row),
        refusals=refusals,
    )


def store_segment(row: PairSegment, front: Front) -> None:
    """Write what was taken from ``front`` back to its segment's row."""
    row.used, row.sealed = front.used, front.sealed_rest()
