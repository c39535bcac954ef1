"""Crash tests on real processes: SIGKILL the relay and the stations at random moments
while the relay scheduler runs, restart them, and check the design's invariants:

1. no byte of link key used by two relay operations (every relay record, and both ends
   of each link consumed the same bytes);
3. no segment ready at one station while the other does not hold it alike;
4. the relay keeps no pair key, and the link key it used is gone.

`make test` runs a short series on SQLite; `make faults` a long one (KEYSTRATA_KILLS=30)
on both backends.
"""

from __future__ import annotations

import hashlib
import os
import random
import time
from pathlib import Path

import pytest
from sqlalchemy import select

from e2enet import (
    RELAY_SETTINGS,
    STOPPED,
    UNBOUNDED,
    both_ends_consumed_alike,
    open_stopped,
    relay_holds_no_pair_key,
    settled,
    wait_for,
)
from keystrata.demo.verify import check_network
from keystrata.loopback.network import NETWORK as NODES
from keystrata.loopback.network import feed_links, set_policy, start_network
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, stop_all
from keystrata.storage.models import PairSegment
from keystrata.storage.sealed import segment_context

KILLS = int(os.environ.get("KEYSTRATA_KILLS", "6"))


def _network(tmp_path: Path, pki: PkiFiles, db_factory) -> dict[str, NodeProcess]:
    return start_network(
        tmp_path,
        pki,
        {n: db_factory() for n in NODES},
        extra=RELAY_SETTINGS,
        policy=UNBOUNDED,
    )


# `make test` runs this series on SQLite (a SIGKILL there interrupts the writer of the
# database file itself) and test_crash_delivery.py's on PostgreSQL, so each backend sees
# one crash series; `make faults` runs both series on both backends.
@pytest.mark.parametrize(
    "db_factory", ["sqlite", pytest.param("postgresql", marks=pytest.mark.slow)], indirect=True
)
def test_sigkill_during_relay_keeps_the_invariants(tmp_path, pki, db_factory) -> None:
    rng = random.Random(20261202)
    nodes = _network(tmp_path, pki, db_factory)
    try:
        feed_links(nodes, pki, 80)
        killed = []
        for _ in range(KILLS):
            time.sleep(rng.uniform(0.1, 0.8))
            victim = nodes[rng.choice(list(NODES))]
            victim.kill()
            killed.append(victim.node_id)
            time.sleep(rng.uniform(0.0, 0.3))
            victim.start(pki)
        # Every node back: stop making segments, let the backlog drain and every
        # segment settle.
        set_policy(nodes, pki, STOPPED)
        wait_for("segments settled after the kills", lambda: settled(nodes, pki))
    finally:
        stop_all(list(nodes.values()))
    configs = {n: nodes[n].config for n in NODES}
    check = check_network(configs["relay-1"], {s: configs[s] for s in ("station-a", "station-b")})
    assert check.problems == []
    assert check.segments_ready_both > 0
    both_ends_consumed_alike(configs)
    _no_two_segments_share_bytes(configs)
    relay_holds_no_pair_key(configs["relay-1"])
    assert len(killed) == KILLS


def _no_two_segments_share_bytes(configs: dict[str, Path]) -> None:
    """Pair key under two segment IDs would be served twice under two key IDs: the
    SHA-256 digests (FIPS 180-4) of the bytes each station still holds are unique
    across segments, and both stations hold the same bytes for every segment ready at
    both."""
    held: dict[str, dict[str, str]] = {}
    for station in ("station-a", "station-b"):
        node = open_stopped(configs[station])
        try:
            with node.db.read() as s:
                rows = s.execute(select(PairSegment).where(PairSegment.state == "ready"))
                held[station] = {
                    row.segment_id: hashlib.sha256(
                        node.keyring.open(row.sealed, segment_context(row, row.used))
                    ).hexdigest()
                    for row in rows.scalars()
                    if row.sealed is not None
                }
        finally:
            node.db.dispose()
        digests = list(held[station].values())
        assert len(set(digests)) == len(digests), station
    # A turns a segment ready and tells B and the relay at once; the relay may hear first,
    # so when the nodes stop B may still wait for A's confirmation of a few segments.
    both = held["station-a"].keys() & held["station-b"].keys()
    assert both, "no segment ready at both stations"
    assert {k: held["station-a"][k] for k in both} == {k: held["station-b"][k] for k in both}
