"""The loopback network's relay and two stations in one process, on their own SQLite
files: the service's use cases called directly, peer messages carried by hand from each
outbox to its destination's dispatcher, link key pushed to both ends of each link as a
QKD module would. For experiments that step a clock through hours of traffic in seconds
(the demand trace of ``bench/demand.py``); nothing here listens on a port.
"""

from __future__ import annotations

import dataclasses
import os
import uuid
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import timedelta
from pathlib import Path
from typing import Any

from sqlalchemy import update

from keystrata.clock import Clock
from keystrata.config import load_settings
from keystrata.context import NodeContext
from keystrata.errors import KeystrataError
from keystrata.links import ingest
from keystrata.links.blocks import BlockIn
from keystrata.loopback.configs import write_config
from keystrata.loopback.network import NETWORK, NETWORK_LINKS, PAIR, RELAY, SAES
from keystrata.loopback.pki import PkiFiles
from keystrata.node import dispatch
from keystrata.node.lifecycle import initialise, load_keyring, open_node
from keystrata.peering import outbox
from keystrata.registry import provisioning
from keystrata.registry.specs import Kind, LinkSpec, NodeSpec, PairPolicy, PairSpec, PrincipalSpec
from keystrata.relay import buffers
from keystrata.storage.db import Database
from keystrata.storage.models import OutboxMessage

#: Far enough ahead that every queued message is due when carried by hand.
_ANY_TIME_AHEAD = timedelta(days=3650)


@dataclass
class InProcessNetwork:
    """The three nodes' contexts, by node ID, and the databases to close."""

    nodes: dict[str, NodeContext]
    databases: list[Database]

    @property
    def relay(self) -> NodeContext:
        return self.nodes[RELAY]

    def carry(self, max_rounds: int = 50) -> None:
        """Deliver queued peer messages, oldest first, until none applies; one that is
        refused (an earlier message still to come) stays queued for the next round."""
        for _ in range(max_rounds):
            moved = False
            for sender, ctx in self.nodes.items():
                far = ctx.clock.now() + _ANY_TIME_AHEAD
                claimed = outbox.claim(ctx.db, now=far, limit=10_000)
                done = []
                for message in claimed:
                    try:
                        dispatch.handle(self.nodes[message.destination], sender, dict(message.body))
                    except KeystrataError:
                        continue
                    done.append(message.id)
                outbox.delivered(ctx.db, done)
                _unclaim(ctx.db, [m.id for m in claimed if m.id not in done])
                moved = moved or bool(done)
            if not moved:
                return

    def report_buffers(self) -> None:
        """What the relay's poll of its stations does, without HTTP."""
        for station in NETWORK_LINKS:
            buffers.record_report(self.relay, buffers.station_report(self.nodes[station], PAIR))

    def feed(self, station: str, n_bytes: int, block_bytes: int = 4096) -> None:
        """Push ``n_bytes`` of fresh link key of ``station``'s link to both its ends."""
        link = NETWORK_LINKS[station]
        now = self.relay.clock.now()
        blocks = [
            BlockIn(str(uuid.uuid4()), os.urandom(block_bytes), 0.02, 1e-10, now)
            for _ in range(max(1, n_bytes // block_bytes))
        ]
        for node in (self.relay, self.nodes[station]):
            ingest.ingest(node, link, blocks, actor=f"mod-{link}", actor_link=link)

    def close(self) -> None:
        for db in self.databases:
            db.dispose()


def build(
    folder: Path,
    pki: PkiFiles,
    *,
    clock: Clock,
    policy: Mapping[str, Any],
    extra: Mapping[str, str] | None = None,
) -> InProcessNetwork:
    """Initialise and provision the relay and both stations under ``folder`` (``extra``:
    TOML lines per node ID), every node on ``clock``."""
    nodes: dict[str, NodeContext] = {}
    databases: list[Database] = []
    for node_id, role in NETWORK.items():
        config = write_config(
            folder / node_id,
            node_id=node_id,
            role=role,
            db_url=f"sqlite:///{folder / node_id / 'node.db'}",
            pki=pki,
            extra=(extra or {}).get(node_id, ""),
        )
        settings = load_settings(config, env={})
        db = Database.from_url(settings.database.url, sqlite_synchronous="NORMAL")
        databases.append(db)
        initialise(settings, db, load_keyring(settings))
        nodes[node_id] = dataclasses.replace(open_node(settings, db), clock=clock)
    for ctx in nodes.values():
        _provision(ctx, policy)
    return InProcessNetwork(nodes=nodes, databases=databases)


def _unclaim(db: Database, ids: list[int]) -> None:
    if ids:
        with db.write() as s:
            s.execute(
                update(OutboxMessage).where(OutboxMessage.id.in_(ids)).values(claimed_until=None)
            )


def _provision(ctx: NodeContext, policy: Mapping[str, Any]) -> None:
    for node_id, role in NETWORK.items():
        if node_id != ctx.node_id:
            node = NodeSpec.model_validate({"node_id": node_id, "role": role})
            provisioning.create(ctx, Kind.NODES, node, actor="loopback")
    for station, link in NETWORK_LINKS.items():
        if ctx.node_id in (RELAY, station):
            qkd_link = LinkSpec(link_id=link, relay_id=RELAY, station_id=station)
            provisioning.create(ctx, Kind.LINKS, qkd_link, actor="loopback")
    pair = PairSpec(
        pair_id=PAIR,
        relay_id=RELAY,
        stations=list(NETWORK_LINKS),
        policy=PairPolicy.model_validate(dict(policy)),
    )
    provisioning.create(ctx, Kind.PAIRS, pair, actor="loopback")
    if ctx.node_id == RELAY:
        return
    for sae, station in SAES.items():
        principal = PrincipalSpec.model_validate(
            {"principal_id": sae, "role": "sae", "cert_subject": sae, "station_id": station}
        )
        provisioning.create(ctx, Kind.PRINCIPALS, principal, actor="loopback")
