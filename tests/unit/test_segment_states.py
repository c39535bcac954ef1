"""The segment state machine (relay/segment_states.py): every transition the stations and
the relay make, and none other."""

from __future__ import annotations

import pytest

from keystrata.relay.segment_states import (
    RelayOpState,
    SegmentEvent,
    SegmentState,
    next_state,
    relay_settled,
)

PENDING, READY, DISCARDED = SegmentState
RECEIVED, CONFIRMED, DISCARD = SegmentEvent

ALLOWED = {
    (None, RECEIVED): PENDING,  # the relay's message applied
    (None, DISCARD): DISCARDED,  # the partner's discard came first: a tombstone
    (PENDING, CONFIRMED): READY,
    (PENDING, DISCARD): DISCARDED,
    (READY, DISCARD): DISCARDED,  # the partner refused A's confirmation
    (DISCARDED, RECEIVED): DISCARDED,  # the relay's message after a tombstone
    (DISCARDED, DISCARD): DISCARDED,  # a bad tag over a tombstone
}


@pytest.mark.parametrize("state", [None, *SegmentState])
@pytest.mark.parametrize("event", list(SegmentEvent))
def test_station_transitions(state: SegmentState | None, event: SegmentEvent) -> None:
    after = ALLOWED.get((state, event))
    if after is None:
        with pytest.raises(ValueError, match="cannot be"):
            next_state(state, event)
    else:
        assert next_state(state, event) is after
        # Stored values come back from the database as plain strings.
        assert next_state(None if state is None else str(state), event) is after


def test_stored_values() -> None:
    assert [str(s) for s in SegmentState] == ["pending", "ready", "discarded"]
    assert [str(s) for s in RelayOpState] == ["sent", "ready", "discarded"]


def test_the_relay_settles_a_segment_once() -> None:
    assert relay_settled("sent", "ready") is RelayOpState.READY
    assert relay_settled("sent", "discarded") is RelayOpState.DISCARDED
    assert relay_settled("ready", "discarded") is None
    assert relay_settled("discarded", "ready") is None
    with pytest.raises(ValueError, match="ready or discarded"):
        relay_settled("sent", "sent")
