"""The ready pair key a station owns, taken from the front (Get key at the master's
station).

Ranges are decided first from the segments' counters (``used``, ``length``) alone;
only the segments a transaction actually takes bytes from are loaded, opened and
re-sealed, once each, however many keys the transaction takes from them. The stock of
ready key can be large; a Get key costs the same whatever its size.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

from sqlalchemy import select
from sqlalchemy.orm import Session

from keystrata.crypto.hazmat import Keyring
from keystrata.errors import SealBroken, StoredKeyBroken
from keystrata.ranges import Range
from keystrata.relay.segment_states import SegmentState
from keystrata.storage.front import LOCKED, segment_front, store_segment
from keystrata.storage.models import PairSegment

log = logging.getLogger("keystrata.delivery")


#: Attempts to lock enough front segments when another worker process takes from the
#: same front at the same time (PostgreSQL; SQLite has one writer).
_LOCK_ATTEMPTS = 8


@dataclass
class _LockedSegment:
    segment_id: str
    start: int  # ``used`` when this transaction locked it
    length: int
    taken: int = 0


class OwnedStock:
    """The front of one pair's owned ready key, locked in the caller's transaction."""

    def __init__(self, session: Session, keyring: Keyring, pair_id: str, owner: str) -> None:
        self.session = session
        self.keyring = keyring
        self.pair_id = pair_id
        self.owner = owner
        self.front: list[_LockedSegment] = []
        self.cursor = 0

    def reserve(self, want: int) -> None:
        """Lock front segments holding at least ``want`` bytes (or all there are).

        The segments are chosen without locks, then locked in one order (segment ID, so
        two workers cannot deadlock) and read again: on PostgreSQL a concurrent
        transaction may have taken from them meanwhile; then more are chosen.
        """
        limit = 4
        for _ in range(_LOCK_ATTEMPTS):
            rows = self.session.execute(
                select(PairSegment.segment_id, PairSegment.length - PairSegment.used)
                .where(
                    PairSegment.pair_id == self.pair_id,
                    PairSegment.owner == self.owner,
                    PairSegment.state == SegmentState.READY,
                    PairSegment.used < PairSegment.length,
                )
                .order_by(PairSegment.settled_at, PairSegment.segment_id)
                .limit(limit)
            ).all()
            chosen, have = [], 0
            for segment_id, left in rows:
                chosen.append(str(segment_id))
                have += int(left)
                if have >= want:
                    break
            everything = len(rows) < limit
            if have < want and not everything:
                limit *= 8  # the front is longer than we looked
                continue
            locked = {
                str(sid): (int(used), int(length))
                for sid, used, length in self.session.execute(
                    select(PairSegment.segment_id, PairSegment.used, PairSegment.length)
                    .where(
                        PairSegment.segment_id.in_(chosen),
                        PairSegment.state == SegmentState.READY,
                        PairSegment.used < PairSegment.length,
                    )
                    .order_by(PairSegment.segment_id)
                    .with_for_update()
                )
            }
            # In front order, as they stand now that they are locked.
            self.front = [_LockedSegment(sid, *locked[sid]) for sid in chosen if sid in locked]
            if everything or self.left >= want:
                return

    @property
    def left(self) -> int:
        return sum(f.length - f.start - f.taken for f in self.front)

    def take(self, n: int) -> list[Range]:
        """The next ``n`` bytes as segment ranges. The caller checked ``left``."""
        if n > self.left:
            raise ValueError("take more than the stock holds")
        out = []
        while n:
            f = self.front[self.cursor]
            room = f.length - f.start - f.taken
            if room == 0:
                self.cursor += 1
                continue
            step = min(n, room)
            out.append(Range(f.segment_id, f.start + f.taken, step))
            f.taken += step
            n -= step
        return out

    def destroy_taken(self) -> dict[str, TakenBytes]:
        """Open each touched segment once, take the bytes :meth:`take` planned and re-seal
        the rest (:mod:`keystrata.storage.front`). Returns the taken bytes by segment.

        Raises:
            StoredKeyBroken: a segment does not open in its row (tampered).
        """
        out = {}
        for f in self.front:
            if not f.taken:
                continue
            row = self.session.get(PairSegment, f.segment_id)
            assert row is not None and row.used == f.start
            front = segment_front(self.keyring, row, LOCKED)
            try:
                taken = front.take(Range(f.segment_id, f.start, f.taken))
            except SealBroken:
                log.error("segment %s does not open in its row: tampered", row.segment_id)
                raise StoredKeyBroken() from None
            store_segment(row, front)
            out[f.segment_id] = TakenBytes(f.start, taken)
        return out


@dataclass(frozen=True)
class TakenBytes:
    """Bytes taken from one segment, which start at its offset ``start``."""

    start: int
    data: bytes = field(repr=False)


def key_bytes(taken: dict[str, TakenBytes], ranges: list[Range]) -> bytes:
    """The bytes of ``ranges`` out of what :meth:`OwnedStock.destroy_taken` returned."""
    parts = []
    for r in ranges:
        part = taken[r.buffer_id]
        parts.append(part.data[r.offset - part.start : r.offset - part.start + r.length])
    return b"".join(parts)
