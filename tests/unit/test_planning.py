"""The relay's planning arithmetic (relay/planning.py), on hand-worked examples."""

from __future__ import annotations

import pytest

from keystrata.relay.planning import MIN_SHARE, buffer_target, owned_share, pair_deficit


@pytest.mark.parametrize(
    ("demand_a", "demand_b", "share_a"),
    [
        (0.0, 0.0, 0.5),  # nothing measured: equal shares
        (3.0, 1.0, 0.75),  # proportional to demand
        (1.0, 0.0, 1 - MIN_SHARE),  # an idle side keeps its floor
        (0.0, 5.0, MIN_SHARE),
    ],
)
def test_owned_share_follows_demand_with_a_floor(demand_a, demand_b, share_a) -> None:
    assert owned_share(demand_a, demand_b) == pytest.approx(share_a)


def test_deficit_is_the_pairs_shortfall_while_nothing_is_measured() -> None:
    assert (
        pair_deficit(
            target=1000, ready=600, in_flight=100, demand_a=0, demand_b=0, owned_a=600, owned_b=0
        )
        == 300
    )


def test_key_owned_by_an_idle_side_does_not_count_for_the_busy_one() -> None:
    # The pair holds its whole target, all of it owned by station a, whose encryptors
    # stopped; station b's encryptors take key. b's share is 0.9 of 1000 bits: 900 short.
    assert (
        pair_deficit(
            target=1000, ready=1000, in_flight=0, demand_a=0, demand_b=1, owned_a=1000, owned_b=0
        )
        == 900
    )
    # What is on its way counts against it.
    assert (
        pair_deficit(
            target=1000, ready=1000, in_flight=400, demand_a=0, demand_b=1, owned_a=1000, owned_b=0
        )
        == 500
    )


def test_target_follows_consumption_within_the_policy_bounds() -> None:
    bounds = {"minimum": 1000, "default": 5000, "maximum": 20_000}
    assert buffer_target(consumption_bps=None, horizon_s=60, **bounds) == 5000
    assert buffer_target(consumption_bps=100, horizon_s=60, **bounds) == 6000
    assert buffer_target(consumption_bps=1, horizon_s=60, **bounds) == 1000
    assert buffer_target(consumption_bps=10_000, horizon_s=60, **bounds) == 20_000


def test_unmet_demand_counts_the_window_and_stays_bounded() -> None:
    from datetime import UTC, datetime, timedelta

    from keystrata.relay.buffers import UnmetDemand

    unmet = UnmetDemand(window_seconds=60)
    t0 = datetime(2026, 12, 3, 8, 0, tzinfo=UTC)
    for i in range(1000):  # a flood of refusals within one second: one entry
        unmet.note("pair-ab", 256, t0 + timedelta(microseconds=i))
    unmet.note("pair-ab", 1024, t0 + timedelta(seconds=30))
    assert unmet.since("pair-ab", t0) == 1000 * 256 + 1024
    assert len(unmet._asked["pair-ab"]) == 2
    # A minute later only the later refusal is in the window; a note prunes too.
    unmet.note("pair-ab", 8, t0 + timedelta(seconds=75))
    assert len(unmet._asked["pair-ab"]) == 2
    assert unmet.since("pair-ab", t0 + timedelta(seconds=15)) == 1024 + 8
    assert unmet.since("pair-xy", t0) == 0
