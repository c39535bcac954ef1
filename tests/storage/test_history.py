"""The dashboard's history sampler (node/history.py) on real databases of both backends:
what one sample writes (each figure counted again here from the rows it describes), one
sampler among several processes (the lease), the retention, and reading back."""

from __future__ import annotations

import dataclasses
import itertools
from datetime import UTC, datetime, timedelta

import pytest
from sqlalchemy import func, select

import relaynet
from conftest import Node
from helpers import SteppedClock
from keystrata.node import history
from keystrata.storage.models import HistorySample, LinkBlock, PairSegment


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    return relaynet.with_ready_key(make_node, db_factory)


def _clocked(node: Node, clock: SteppedClock) -> Node:
    return dataclasses.replace(node, ctx=dataclasses.replace(node.ctx, clock=clock))


def _rows(node: Node) -> list[tuple[datetime, str, str, float]]:
    with node.ctx.db.read() as s:
        return [
            (r.at if r.at.tzinfo else r.at.replace(tzinfo=UTC), r.series, r.subject, r.value)
            for r in s.execute(select(HistorySample).order_by(HistorySample.id)).scalars()
        ]


def _latest(node: Node) -> dict[tuple[str, str], float]:
    rows = _rows(node)
    last = max(r[0] for r in rows)
    return {(series, subject): value for at, series, subject, value in rows if at == last}


def test_a_station_sample_holds_its_pools_buffers_and_deliveries(net, api) -> None:
    clock = SteppedClock(datetime.now(UTC))
    a = _clocked(net.a, clock)
    # Two keys to a master here, so the delivery counts are not zero.
    r = api(net.a)("sae-a1").post("/api/v1/keys/sae-b1/enc_keys", json={"number": 2, "size": 256})
    assert r.status_code == 200, r.text
    assert history.sample_once(a.ctx, "worker-1") is False
    got = _latest(a)
    with a.ctx.db.read() as s:
        link_left = s.execute(
            select(func.sum(LinkBlock.length - LinkBlock.used)).where(LinkBlock.link_id == "link-a")
        ).scalar_one()
        link_total = s.execute(
            select(func.sum(LinkBlock.length)).where(LinkBlock.link_id == "link-a")
        ).scalar_one()
        ready = s.execute(
            select(func.sum(PairSegment.length - PairSegment.used)).where(
                PairSegment.pair_id == relaynet.PAIR, PairSegment.state == "ready"
            )
        ).scalar_one()
    window = a.ctx.settings.ingest.rate_window_seconds
    assert got[("link_pool_bits", "link-a")] == 8 * link_left
    assert got[("link_rate_bps", "link-a")] == pytest.approx(8 * link_total / window)
    assert got[("link_qber", "link-a")] == pytest.approx(0.02)  # every fed block says 0.02
    assert got[("pair_ready_bits", relaynet.PAIR)] == 8 * ready
    assert got[("keys_delivered", relaynet.PAIR)] == 2
    assert got[("key_bits_delivered", relaynet.PAIR)] == 512
    # No link profile, so no plan; a station knows no target: neither is made up.
    assert ("link_planned_bps", "link-a") not in got
    assert ("pair_target_bits", relaynet.PAIR) not in got
    assert {series for series, _ in got} <= set(history.SERIES)


def test_a_relay_sample_holds_the_schedulers_view(net) -> None:
    net.report_buffers()
    clock = SteppedClock(datetime.now(UTC))
    relay = _clocked(net.relay, clock)
    history.sample_once(relay.ctx, "worker-1")
    got = _latest(relay)
    with net.a.ctx.db.read() as s:
        ready_a = s.execute(
            select(func.sum(PairSegment.length - PairSegment.used)).where(
                PairSegment.state == "ready"
            )
        ).scalar_one()
    # The relay's ready figure is the smaller of the two stations' reports; both
    # stations hold the same segments here.
    assert got[("pair_ready_bits", relaynet.PAIR)] == 8 * ready_a
    assert got[("pair_target_bits", relaynet.PAIR)] > 0
    assert {("link_pool_bits", "link-a"), ("link_pool_bits", "link-b")} <= set(got)
    assert not any(series == "keys_delivered" for series, _ in got)


def test_one_sampler_among_processes_and_none_twice_per_interval(net) -> None:
    clock = SteppedClock(datetime.now(UTC))
    a = _clocked(net.a, clock)
    interval = a.ctx.settings.dashboard.sample_seconds
    history.sample_once(a.ctx, "worker-1")
    first = len(_rows(a))
    assert first > 0
    history.sample_once(a.ctx, "worker-2")  # holds no lease: samples nothing
    history.sample_once(a.ctx, "worker-1")  # its last sample is too recent
    assert len(_rows(a)) == first
    clock.advance(interval)
    history.sample_once(a.ctx, "worker-2")
    history.sample_once(a.ctx, "worker-1")
    assert len(_rows(a)) == 2 * first
    # The holder stops; once its lease runs out the other process takes over.
    clock.advance(max(10.0, 3 * interval) + 1)
    history.sample_once(a.ctx, "worker-2")
    assert len(_rows(a)) == 3 * first


def test_samples_past_the_retention_are_deleted(net) -> None:
    clock = SteppedClock(datetime(2026, 12, 1, tzinfo=UTC))
    a = _clocked(net.a, clock)
    days = a.ctx.settings.dashboard.retention_days
    history.sample_once(a.ctx, "w")
    clock.advance(86_400 * days / 2)
    history.sample_once(a.ctx, "w")
    assert len({r[0] for r in _rows(a)}) == 2
    clock.advance(86_400 * days / 2 + 1)  # the first sample is now older than the retention
    history.sample_once(a.ctx, "w")
    kept = sorted({r[0] for r in _rows(a)})
    assert kept == [clock.at - timedelta(seconds=86_400 * days / 2 + 1), clock.at]


def test_points_are_thinned_evenly_keeping_the_newest(net) -> None:
    start = datetime(2026, 12, 1, 12, tzinfo=UTC)
    clock = SteppedClock(start)
    a = _clocked(net.a, clock)
    for _ in range(50):
        history.sample_once(a.ctx, "w")
        clock.advance(a.ctx.settings.dashboard.sample_seconds)
    newest = clock.at - timedelta(seconds=a.ctx.settings.dashboard.sample_seconds)
    (found,) = history.points(
        a.ctx, "link_pool_bits", subject="link-a", since=start, until=clock.at, limit=10
    )
    times = [t for t, _ in found.points]
    assert len(times) == 10
    assert times[-1] == newest.timestamp()
    steps = {round(b - a_, 6) for a_, b in itertools.pairwise(times)}
    assert steps == {5 * a.ctx.settings.dashboard.sample_seconds}  # every 5th of 50
    (every,) = history.points(
        a.ctx, "link_pool_bits", subject="link-a", since=start, until=clock.at, limit=500
    )
    assert len(every.points) == 50
    # Every subject that has samples, when none is named.
    both = history.points(
        a.ctx, "pair_ready_bits", subject=None, since=start, until=clock.at, limit=5
    )
    assert [p.subject for p in both] == [relaynet.PAIR]
