"""Demand steers the relay, end to end in one process: encryptors take key with Get key
(ETSI GS QKD 014) at a station, the station's buffer report counts the bits it handed to
its masters over the rate window, and the relay's scheduler sets the pair's buffer target
from that consumption and gives ownership of new segments to the side that consumes.

A short demand trace, on a clock the test steps: consumption steps up at station-a,
moves to station-b, and stops. After each change the first scheduler cycle that sees the
stations' reports already follows it (target and owners).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from datetime import UTC, datetime
from typing import Any

import pytest

import relaynet
from helpers import SteppedClock
from keystrata.relay import buffers, planning, scheduler

WINDOW = 60  # [ingest] rate_window_seconds
HORIZON = 1200.0  # [relay] horizon_seconds
POLICY = {"buffer_min_bits": 0, "buffer_target_bits": 64_000, "buffer_max_bits": 4_000_000}
RELAY = f"""
[ingest]
rate_window_seconds = {WINDOW}
[relay]
horizon_seconds = {HORIZON}
segment_bytes = 4096
min_segment_bytes = 1024
"""
STATION = f"\n[ingest]\nrate_window_seconds = {WINDOW}\n"


@pytest.fixture
def net(make_node, db_factory) -> Any:
    relay = make_node("relay-1", "relay", db_url=db_factory(), extra=RELAY)
    a = make_node("station-a", "station", db_url=db_factory(), extra=STATION)
    b = make_node("station-b", "station", db_url=db_factory(), extra=STATION)
    for node in (relay, a, b):
        relaynet.provision(node, POLICY)
    net = relaynet.RelayNet(relay=relay, a=a, b=b)
    relaynet.provision_saes(net)
    clock = SteppedClock(datetime.now(UTC))
    for node in net.nodes.values():
        node.ctx = dataclasses.replace(node.ctx, clock=clock)
    net.clock = clock
    net.feed("station-a", 200)
    net.feed("station-b", 200)
    return net


def _cycle(net: Any) -> tuple[int, list[str]]:
    """One scheduler cycle after the stations reported: the pair's target (bits) and the
    owner of each byte-range of 1,024 bytes of the segments it made; then the segments
    become ready at both stations."""
    net.drain()
    net.report_buffers()
    (view,) = buffers.relay_view(net.relay.ctx)
    made = scheduler.schedule_once(net.relay.ctx, None).made
    net.drain()
    net.report_buffers()
    return view.target_bits, [m.owner for m in made for _ in range(m.length // 1024)]


def _take(client: Callable[[str], Any], station: str, slave: str, requests: int) -> int:
    """Get key at ``station``: ``requests`` requests of 8 keys of 1024 bits. Returns bits."""
    got = 0
    for _ in range(requests):
        r = client(station).post(f"/api/v1/keys/{slave}/enc_keys", json={"number": 8, "size": 1024})
        assert r.status_code == 200, r.text
        got += 8 * 1024
    return got


def test_target_and_ownership_follow_a_demand_trace(net, api) -> None:
    sae = {"station-a": api(net.a)("sae-a1"), "station-b": api(net.b)("sae-b1")}

    def client(station: str) -> Any:
        return sae[station]

    # No demand yet: the policy's default target, owned key split evenly.
    target, owners = _cycle(net)
    assert target == POLICY["buffer_target_bits"]
    assert owners and abs(owners.count("station-a") - owners.count("station-b")) <= 1

    # Consumption steps up at station-a: 24,576 bits within the window, so the target is
    # that rate for the horizon (491,520 bits), and new key goes to station-a, all but
    # the floor share an idle side keeps (planning.MIN_SHARE).
    net.clock.advance(5)
    taken = _take(client, "station-a", "sae-b1", 3)
    target, owners = _cycle(net)
    assert target == int(taken / WINDOW * HORIZON) > POLICY["buffer_target_bits"]
    assert owners and owners.count("station-a") / len(owners) >= 1 - planning.MIN_SHARE
    assert buffers.station_report(net.b.ctx, relaynet.PAIR).delivered_bits == 0

    # The demand moves to station-b: station-a's deliveries leave the window, and what the
    # relay makes next is station-b's (station-a already holds more than its floor).
    net.clock.advance(WINDOW + 1)
    taken = _take(client, "station-b", "sae-a1", 3)
    target, owners = _cycle(net)
    assert target == int(taken / WINDOW * HORIZON)
    assert owners and set(owners) == {"station-b"}
    assert buffers.station_report(net.a.ctx, relaynet.PAIR).delivered_bits == 0

    # Consumption stops: once the window is past, the target is the default again, and
    # the pair holds more than that, so the relay spends no link key on it.
    net.clock.advance(WINDOW + 1)
    target, owners = _cycle(net)
    assert target == POLICY["buffer_target_bits"]
    assert owners == []
