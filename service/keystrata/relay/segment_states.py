"""The life of a pair key segment, as plain data: every state change goes through here.

At a station (``PairSegment.state``)::

    no record --received--> pending --confirmed--> ready
        |                      |                     |
        +------discarded-------+------discarded------+-----> discarded

* ``received``: the relay's notice (at A) or ciphertext (at B) was applied; its link
  bytes are spent.
* ``confirmed``: the two stations' check values matched.
* ``discarded``: a bad tag, a check value that does not match, a confirmation that never
  came, or the partner's discard. A discard that arrives before the relay's message
  leaves a *tombstone* (discarded, no key); the relay's message then spends its link
  bytes and the segment stays discarded, and a bad tag over a tombstone discards it
  again. A ready segment is discarded only when the partner refused A's confirmation
  (tampering, recorded as such). A tombstone left under a segment ID for another pair is
  not this segment's record: the relay's message starts it afresh (``current=None``).

At the relay (``RelayOp.state``): ``sent`` until the notice station reports the segment
``ready`` or ``discarded``; a second report changes nothing.
"""

from __future__ import annotations

from collections.abc import Mapping
from enum import StrEnum


class SegmentState(StrEnum):
    """A station's segment: the stored value of ``PairSegment.state``."""

    PENDING = "pending"
    READY = "ready"
    DISCARDED = "discarded"


class SegmentEvent(StrEnum):
    """What happens to a segment at a station."""

    RECEIVED = "received"
    CONFIRMED = "confirmed"
    DISCARDED = "discarded"


_STATION: Mapping[tuple[SegmentState | None, SegmentEvent], SegmentState] = {
    (None, SegmentEvent.RECEIVED): SegmentState.PENDING,
    (None, SegmentEvent.DISCARDED): SegmentState.DISCARDED,
    (SegmentState.PENDING, SegmentEvent.CONFIRMED): SegmentState.READY,
    (SegmentState.PENDING, SegmentEvent.DISCARDED): SegmentState.DISCARDED,
    (SegmentState.READY, SegmentEvent.DISCARDED): SegmentState.DISCARDED,
    (SegmentState.DISCARDED, SegmentEvent.RECEIVED): SegmentState.DISCARDED,
    (SegmentState.DISCARDED, SegmentEvent.DISCARDED): SegmentState.DISCARDED,
}


def next_state(current: str | None, event: SegmentEvent) -> SegmentState:
    """The state a segment in ``current`` (None: no record of it yet) takes on ``event``.

    Raises:
        ValueError: the segment cannot go that way (a programming error).
    """
    state = None if current is None else SegmentState(current)
    after = _STATION.get((state, event))
    if after is None:
        raise ValueError(f"a segment in state {current} cannot be {event}")
    return after


class RelayOpState(StrEnum):
    """The relay's record of a segment it made: the stored value of ``RelayOp.state``."""

    SENT = "sent"
    READY = "ready"
    DISCARDED = "discarded"


def relay_settled(current: str, outcome: str) -> RelayOpState | None:
    """The relay record's state once the notice station reported ``outcome``, or None
    when the record had already settled (the report changes nothing).

    Raises:
        ValueError: ``outcome`` is neither ready nor discarded.
    """
    if outcome not in (RelayOpState.READY, RelayOpState.DISCARDED):
        raise ValueError("outcome must be ready or discarded")
    if RelayOpState(current) is not RelayOpState.SENT:
        return None
    return RelayOpState(outcome)
