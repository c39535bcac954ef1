"""The relay scheduler: leases (exactly one acting scheduler), buffer targets, fair
sharing and ownership, driven by hand on real databases (two uvicorn workers on
PostgreSQL, where exactly one scheduler acts: tests/e2e/test_scheduler_processes.py)."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import relaynet
from keystrata.relay import planning, scheduler
from keystrata.storage import leases
from keystrata.storage.models import Lease


def test_lease_has_one_holder_at_a_time(db_url) -> None:
    from keystrata.storage.db import Database

    db = Database.from_url(db_url)
    now = datetime.now(UTC)
    ttl = timedelta(seconds=10)
    try:
        assert leases.acquire(db, "x", "w1", now=now, ttl=ttl)
        assert not leases.acquire(db, "x", "w2", now=now, ttl=ttl)
        assert leases.acquire(db, "x", "w1", now=now + timedelta(seconds=5), ttl=ttl)  # renew
        assert not leases.acquire(db, "x", "w2", now=now + timedelta(seconds=14), ttl=ttl)
        # w1 stopped renewing: after expiry w2 takes over, and w1 no longer holds it.
        assert leases.acquire(db, "x", "w2", now=now + timedelta(seconds=16), ttl=ttl)
        with db.read() as s:
            assert s.get(Lease, "x").holder == "w2"
        assert not leases.acquire(db, "x", "w1", now=now + timedelta(seconds=17), ttl=ttl)
    finally:
        db.dispose()


def test_scheduler_fills_the_buffer_to_its_target_and_stops(make_node, db_factory) -> None:
    # Target 64 kbit = 8000 bytes of ready key at both stations.
    net = relaynet.build(
        make_node,
        db_factory,
        policy={"buffer_min_bits": 0, "buffer_target_bits": 64_000, "buffer_max_bits": 1_000_000},
    )
    net.feed("station-a", 10)
    net.feed("station-b", 10)
    # Without both stations' reports the scheduler does not guess.
    idle = scheduler.schedule_once(net.relay.ctx, None)
    assert idle.made == []
    assert "buffer reports" in idle.skipped[relaynet.PAIR]
    net.report_buffers()
    first = scheduler.schedule_once(net.relay.ctx, None)
    assert sum(m.length for m in first.made) == 8000
    # Nothing more while those segments are on their way.
    assert scheduler.schedule_once(net.relay.ctx, None).made == []
    net.drain()
    net.report_buffers()
    assert scheduler.schedule_once(net.relay.ctx, None).made == []
    ready = {s for s, r in net.segments("station-a").items() if r.state == "ready"}
    assert len(ready) == len(first.made)


def test_owners_alternate_while_there_is_no_demand(make_node, db_factory) -> None:
    net = relaynet.build(
        make_node,
        db_factory,
        policy={"buffer_min_bits": 0, "buffer_target_bits": 8 * 40_000, "buffer_max_bits": 10**7},
    )
    net.feed("station-a", 12)
    net.feed("station-b", 12)
    net.report_buffers()
    made = scheduler.schedule_once(net.relay.ctx, None).made
    owners = [m.owner for m in made]
    # Equal demand (none measured): owned key is split evenly, segment by segment.
    assert abs(owners.count("station-a") - owners.count("station-b")) <= 1
    assert planning.choose_owner("station-a", "station-b", 3.0, 1.0, 0, 0) == "station-a"
    # With demand 3:1, station-a's share is 75 %: above it (80 %) the next segment goes to
    # station-b, below it (70 %) to station-a.
    assert planning.choose_owner("station-a", "station-b", 3.0, 1.0, 800, 200) == "station-b"
    assert planning.choose_owner("station-a", "station-b", 3.0, 1.0, 700, 300) == "station-a"


def test_scarce_link_key_is_shared_by_priority(make_node, db_factory) -> None:
    """Two pairs share station-b's link 1:3 by priority (weighted max-min fairness; the
    fairness module's own tests check the arithmetic against hand-worked examples)."""
    net = relaynet.build(
        make_node,
        db_factory,
        policy={
            "priority": 1,
            "buffer_min_bits": 0,
            "buffer_target_bits": 10**9,
            "buffer_max_bits": 10**9,
        },
    )
    # A second pair through the same relay: station-b with station-c, priority 3.
    c = make_node("station-c", "station", db_url=db_factory())
    relaynet.add_third_station(net, c, priority=3)
    net.feed("station-a", 40)
    net.feed("station-c", 40)
    net.feed("station-b", 4)  # 16384 bytes: the bottleneck both pairs share
    net.report_buffers()
    relaynet.report_third(net, c)
    made = scheduler.schedule_once(net.relay.ctx, None).made
    by_pair: dict[str, int] = {}
    for m in made:
        by_pair[m.pair_id] = by_pair.get(m.pair_id, 0) + m.length
    # 16384 bytes less the MAC-key reserve, shared 1:3, rounded down to 4096-byte grains.
    assert by_pair.get("pair-bc", 0) > 2 * by_pair.get(relaynet.PAIR, 0)
    assert sum(by_pair.values()) <= 16384
