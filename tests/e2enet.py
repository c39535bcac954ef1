"""What the end-to-end tests on a loopback relay network share: relay settings that make
segments quickly, waiting until the stations hold key and every segment has settled,
and checks of the nodes' databases after a run (read with the nodes stopped)."""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

from sqlalchemy import select

from keystrata.config import load_settings
from keystrata.context import NodeContext
from keystrata.loopback.network import NETWORK_LINKS, RELAY, in_flight_bits, set_policy
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess
from keystrata.node.lifecycle import open_node
from keystrata.storage.db import Database
from keystrata.storage.models import LinkBlock, PairSegment
from keystrata.storage.sealed import block_context
from keystrata_client import OperatorClient
from keystrata_client.keys import KeyClient

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
#: A policy whose target no run reaches: the relay relays all the link key it has.
UNBOUNDED = {"buffer_min_bits": 0, "buffer_target_bits": 2**40, "buffer_max_bits": 2**40}
#: A policy under which the relay makes no more segments.
STOPPED = {"buffer_min_bits": 0, "buffer_target_bits": 0, "buffer_max_bits": 0}
#: (master SAE, slave SAE, the master's station): one direction each way.
DIRECTIONS = (("sae-a1", "sae-b1", "station-a"), ("sae-b2", "sae-a2", "station-b"))


def wait_for(what: str, check: Callable[[], Any], timeout: float = 60, every: float = 0.1) -> Any:
    """Ask ``check`` until it answers something true; return that answer."""
    deadline = time.monotonic() + timeout
    while not (answer := check()):
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        time.sleep(every)
    return answer


def settled(nodes: Mapping[str, NodeProcess], pki: PkiFiles) -> bool:
    """No segment on its way from the relay."""
    return in_flight_bits(nodes, pki) == 0


def quiet(nodes: Mapping[str, NodeProcess], pki: PkiFiles) -> bool:
    """No segment on its way anywhere, and both stations hold the same ready key."""
    if not settled(nodes, pki):
        return False
    views = []
    for station in NETWORK_LINKS:
        with OperatorClient(nodes[station].url, pki.identity("ops-ada")) as op:
            (view,) = op.pairs()["pairs"]
        views.append(view)
    a, b = views
    return bool(a["pending_bits"] == b["pending_bits"] == 0 and a["ready_bits"] == b["ready_bits"])


def stocked(nodes: Mapping[str, NodeProcess], pki: PkiFiles, keys: int) -> bool:
    """Each station can hand out ``keys`` keys to its master SAE of :data:`DIRECTIONS`."""
    for master, slave, station in DIRECTIONS:
        with KeyClient(nodes[station].url, pki.identity(master)) as kme:
            if kme.status(slave).stored_key_count < keys:
                return False
    return True


def stock_and_stop(
    nodes: Mapping[str, NodeProcess],
    pki: PkiFiles,
    keys: int,
    until: Callable[[Mapping[str, NodeProcess], PkiFiles], bool] = settled,
) -> None:
    """Wait until both stations own ``keys`` ready keys, then stop the relay making
    segments and wait ``until`` the network has settled."""
    wait_for("ready key owned by both stations", lambda: stocked(nodes, pki, keys))
    set_policy(nodes, pki, STOPPED)
    wait_for("every segment settled", lambda: until(nodes, pki))


def add_auditor(nodes: Mapping[str, NodeProcess], pki: PkiFiles) -> None:
    """Register the test auditor aud-ben on every node."""
    for node in nodes.values():
        with OperatorClient(node.url, pki.identity("ops-ada")) as ops:
            ops.create(
                "principals",
                {"principal_id": "aud-ben", "role": "auditor", "cert_subject": "aud-ben"},
            )


def open_stopped(config: Path) -> NodeContext:
    """A stopped node's context, opened from its configuration (dispose its db after)."""
    settings = load_settings(config, env={})
    return open_node(settings, Database.from_url(settings.database.url))


def both_ends_consumed_alike(configs: Mapping[str, Path]) -> None:
    """Both ends of each link used the same bytes of each block."""
    relay = open_stopped(configs[RELAY])
    try:
        for station, link in NETWORK_LINKS.items():
            node = open_stopped(configs[station])
            try:
                q = select(LinkBlock.block_id, LinkBlock.used).where(LinkBlock.link_id == link)
                with relay.db.read() as r, node.db.read() as s:
                    assert dict(r.execute(q).all()) == dict(s.execute(q).all())
            finally:
                node.db.dispose()
    finally:
        relay.db.dispose()


def relay_holds_no_pair_key(config: Path) -> None:
    """The relay keeps no segment, and the link key it used is gone."""
    relay = open_stopped(config)
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
