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
import signal
import time
import uuid
from datetime import UTC, datetime
from pathlib import Path

import pytest
from sqlalchemy import select

from keystrata.config import load_settings
from keystrata.demo.verify import check_network
from keystrata.loopback.network import NETWORK as NODES
from keystrata.loopback.network import NETWORK_LINKS as LINKS
from keystrata.loopback.network import start_network
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, stop_all
from keystrata.node.lifecycle import open_node
from keystrata.storage.db import Database
from keystrata.storage.models import LinkBlock, PairSegment
from keystrata.storage.sealed import block_context, segment_context
from keystrata_client import LinkBlock as Block
from keystrata_client import ModuleClient, OperatorClient, TlsIdentity

KILLS = int(os.environ.get("KEYSTRATA_KILLS", "6"))
RELAY_SETTINGS = """
[relay]
segment_bytes = 6000
min_segment_bytes = 1000
cycle_seconds = 0.05
max_in_flight_segments = 6

[segments]
confirm_timeout_seconds = 3600

[outbox]
max_backoff_seconds = 1.0
"""


def ident(pki: PkiFiles, name: str) -> TlsIdentity:
    return TlsIdentity(ca=pki.ca, cert=pki.cert(name), key=pki.key(name))


def _network(tmp_path: Path, pki: PkiFiles, db_factory) -> dict[str, NodeProcess]:
    return start_network(
        tmp_path,
        pki,
        {n: db_factory() for n in NODES},
        extra=RELAY_SETTINGS,
        policy={"buffer_min_bits": 0, "buffer_target_bits": 2**40, "buffer_max_bits": 2**40},
    )


def _feed(nodes: dict[str, NodeProcess], pki: PkiFiles, blocks_per_link: int) -> None:
    for station, link in LINKS.items():
        blocks = [
            Block(
                block_id=str(uuid.uuid4()),
                key=os.urandom(4096),
                qber=0.02,
                epsilon=1e-10,
                produced_at=datetime.now(UTC),
            )
            for _ in range(blocks_per_link)
        ]
        for end in ("relay-1", station):
            with ModuleClient(
                nodes[end].url, ident(pki, f"mod-{link}"), attempts=20, backoff=0.2
            ) as mod:
                mod.push_blocks(link, blocks)


def _settled(nodes: dict[str, NodeProcess], pki: PkiFiles) -> bool:
    with OperatorClient(nodes["relay-1"].url, ident(pki, "ops-ada")) as ops:
        pairs = ops.pairs()["pairs"]
    return all(p["in_flight_bits"] == 0 for p in pairs)


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
        _feed(nodes, pki, 80)
        killed = []
        for _ in range(KILLS):
            time.sleep(rng.uniform(0.1, 0.8))
            victim = nodes[rng.choice(list(NODES))]
            victim.stop(signal.SIGKILL)
            killed.append(victim.node_id)
            time.sleep(rng.uniform(0.0, 0.3))
            victim.start(pki)
        # Every node back: stop making segments, let the backlog drain and every
        # segment settle.
        with OperatorClient(nodes["relay-1"].url, ident(pki, "ops-ada")) as ops:
            ops.change(
                "pairs",
                "pair-ab",
                {"policy": {"buffer_min_bits": 0, "buffer_target_bits": 0, "buffer_max_bits": 0}},
            )
        deadline = time.monotonic() + 60
        while not _settled(nodes, pki):
            assert time.monotonic() < deadline, "segments did not settle after the kills"
            time.sleep(0.1)
    finally:
        stop_all(list(nodes.values()))
    configs = {n: nodes[n].config for n in NODES}
    check = check_network(configs["relay-1"], {s: configs[s] for s in ("station-a", "station-b")})
    assert check.problems == []
    assert check.segments_ready_both > 0
    _both_ends_consumed_alike(configs)
    _no_two_segments_share_bytes(configs)
    _relay_holds_no_pair_key(configs["relay-1"])
    assert len(killed) == KILLS


def _open(config: Path):
    settings = load_settings(config, env={})
    db = Database.from_url(settings.database.url)
    return open_node(settings, db)


def _both_ends_consumed_alike(configs: dict[str, Path]) -> None:
    relay = _open(configs["relay-1"])
    try:
        for station, link in LINKS.items():
            node = _open(configs[station])
            try:
                q = select(LinkBlock.block_id, LinkBlock.used).where(LinkBlock.link_id == link)
                with relay.db.read() as r, node.db.read() as s:
                    assert dict(r.execute(q).all()) == dict(s.execute(q).all())
            finally:
                node.db.dispose()
    finally:
        relay.db.dispose()


def _no_two_segments_share_bytes(configs: dict[str, Path]) -> None:
    """Pair key under two segment IDs would be served twice under two key IDs: the
    SHA-256 digests (FIPS 180-4) of the bytes each station still holds are unique
    across segments, and both stations hold the same bytes for every segment ready at
    both."""
    held: dict[str, dict[str, str]] = {}
    for station in ("station-a", "station-b"):
        node = _open(configs[station])
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


def _relay_holds_no_pair_key(config: Path) -> None:
    relay = _open(config)
    try:
        with relay.db.read() as s:
            assert s.execute(select(PairSegment)).first() is None
            for row in s.execute(select(LinkBlock)).scalars():
                if row.sealed is None:
                    assert row.used == row.length
                    continue
                left = relay.keyring.open(
                    row.sealed, block_context(row.link_id, row.block_id, row.used)
                )
                assert len(left) == row.length - row.used  # the used part is gone
    finally:
        relay.db.dispose()
