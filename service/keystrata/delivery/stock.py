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
from typing import Any, cast

from sqlalchemy import Select, Table, bindparam, select, update
from sqlalchemy.orm import Session

from keystrata.crypto.hazmat import Keyring
from keystrata.errors import SealBroken, StoredKeyBroken
from keystrata.ranges import Range
from keystrata.relay.segment_states import SegmentState
from keystrata.storage.front import LOCKED, segment_front
from keystrata.storage.models import PairSegment

log = logging.getLogger("keystrata.delivery")


#: Attempts to lock enough front segments when another worker process takes from the
#: same front at the same time (PostgreSQL; SQLite has one writer).
_LOCK_ATTEMPTS = 8

_TABLE = cast(Table, PairSegment.__table__)
_S = _TABLE.c
_LIVE = (_S.state == SegmentState.READY, _S.used < _S.length)
#: The owned ready segments of a pair, front first.
_FRONT = (
    select(_S.segment_id, _S.used, _S.length)
    .where(_S.pair_id == bindparam("pair"), _S.owner == bindparam("owner"), *_LIVE)
    .order_by(_S.settled_at, _S.segment_id)
    .limit(bindparam("limit"))
)
#: PostgreSQL: the front segments no other transaction holds, locked at once (a second
#: worker takes from the next segment instead of waiting for the first one's commit).
_FREE_FRONT = _FRONT.with_for_update(skip_locked=True)
_LOCK = (
    select(_S.segment_id, _S.used, _S.length)
    .where(_S.segment_id.in_(bindparam("ids", expanding=True)), *_LIVE)
    .order_by(_S.segment_id)
    .with_for_update()
)
_OPEN = select(
    _S.segment_id, _S.pair_id, _S.side, _S.partner, _S.owner, _S.length, _S.used, _S.sealed
).where(_S.segment_id.in_(bindparam("ids", expanding=True)))
_STORE = (
    update(_TABLE)
    .where(_S.segment_id == bindparam("sid"))
    .values(used=bindparam("new_used"), sealed=bindparam("new_sealed"))
)


@dataclass
class _Sealed:
    """The columns of :data:`_OPEN`, as :func:`segment_front` reads them."""

    segment_id: str
    pair_id: str
    side: str
    partner: str
    owner: str
    length: int
    used: int
    sealed: bytes | None


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

        SQLite: the transaction holds the only write lock, so the front as read is
        the front. PostgreSQL: first the front segments no other transaction holds,
        locked without waiting; when those are too few (another worker holds the rest),
        those locks are let go and the segments are chosen without locks, then locked in
        one order (segment ID, so two workers cannot deadlock) and read again, and more
        are chosen when a concurrent transaction took from them meanwhile.
        """
        if self.session.get_bind().dialect.name == "sqlite":
            self.front = self._choose(_FRONT, want)
            return
        # In a savepoint: rolling back to it releases the row locks it took (PostgreSQL,
        # "Explicit Locking"), so a worker that found too few free segments waits for
        # the others' holding nothing, and two such workers cannot deadlock.
        free = self.session.begin_nested()
        self.front = self._choose(_FREE_FRONT, want)
        if self.left >= want:
            free.commit()
            return
        free.rollback()
        limit = 4
        for _ in range(_LOCK_ATTEMPTS):
            rows = self._rows(_FRONT, limit)
            chosen, have = [], 0
            for segment_id, used, length in rows:
                chosen.append(str(segment_id))
                have += int(length) - int(used)
                if have >= want:
                    break
            everything = len(rows) < limit
            if have < want and not everything:
                limit *= 8  # the front is longer than we looked
                continue
            locked = {
                str(sid): (int(used), int(length))
                for sid, used, length in self.session.execute(_LOCK, {"ids": chosen})
            }
            # In front order, as they stand now that they are locked.
            self.front = [_LockedSegment(sid, *locked[sid]) for sid in chosen if sid in locked]
            if everything or self.left >= want:
                return

    def _rows(self, statement: Select[Any], limit: int) -> list[Any]:
        params = {"pair": self.pair_id, "owner": self.owner, "limit": limit}
        return list(self.session.execute(statement, params).all())

    def _choose(self, statement: Select[Any], want: int) -> list[_LockedSegment]:
        """Front segments from ``statement`` until they hold ``want`` bytes (or all)."""
        limit = 4
        while True:
            rows = self._rows(statement, limit)
            front, have = [], 0
            for segment_id, used, length in rows:
                front.append(_LockedSegment(str(segment_id), int(used), int(length)))
                have += int(length) - int(used)
                if have >= want:
                    return front
            if len(rows) < limit:
                return front
            limit *= 8

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
        the rest (:mod:`keystrata.storage.front`), in one read and one write for all of
        them. Returns the taken bytes by segment.

        Raises:
            StoredKeyBroken: a segment does not open in its row (tampered).
        """
        touched = {f.segment_id: f for f in self.front if f.taken}
        if not touched:
            return {}
        out, stored = {}, []
        for row in self.session.execute(_OPEN, {"ids": list(touched)}):
            f = touched[row.segment_id]
            assert row.used == f.start
            front = segment_front(self.keyring, _Sealed(*row), LOCKED)
            try:
                taken = front.take(Range(f.segment_id, f.start, f.taken))
            except SealBroken:
                log.error("segment %s does not open in its row: tampered", row.segment_id)
                raise StoredKeyBroken() from None
            stored.append(
                {"sid": f.segment_id, "new_used": front.used, "new_sealed": front.sealed_rest()}
            )
            out[f.segment_id] = TakenBytes(f.start, taken)
        assert len(out) == len(touched)
        self.session.execute(_STORE, stored)
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
