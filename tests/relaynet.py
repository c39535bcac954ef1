"""An in-process relay network for tests: a relay and two stations, each with its own
real database, and a "network" that carries outbox messages between them by calling the
same dispatcher the peer route calls. Tests choose when messages move, so they can lose
replies, resend, reorder and stop nodes between any two transactions."""

from __future__ import annotations

import hashlib
import os
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

from sqlalchemy import select

from conftest import Node, NodeFactory
from keystrata.errors import KeystrataError
from keystrata.links import ingest
from keystrata.links.blocks import BlockIn
from keystrata.loopback.pki import cert_pin
from keystrata.node import dispatch
from keystrata.peering import outbox
from keystrata.registry import provisioning
from keystrata.registry.specs import (
    Kind,
    LinkSpec,
    NodeSpec,
    PairPolicy,
    PairSpec,
    PrincipalSpec,
)
from keystrata.relay import operation
from keystrata.relay.buffers import record_report, station_report
from keystrata.storage.models import PairSegment
from keystrata.storage.sealed import segment_context

PAIR = "pair-ab"
LINKS = {"station-a": "link-a", "station-b": "link-b"}


@dataclass
class RelayNet:
    relay: Node
    a: Node
    b: Node
    extra: dict[str, Node] = field(default_factory=dict)
    links: dict[str, str] = field(default_factory=lambda: dict(LINKS))

    @property
    def nodes(self) -> dict[str, Node]:
        return {"relay-1": self.relay, "station-a": self.a, "station-b": self.b, **self.extra}

    def feed(
        self,
        station: str,
        n_blocks: int,
        block_bytes: int = 4096,
        epsilon: float = 1e-10,
        retries: int = 0,
    ) -> None:
        """Push identical random blocks of the station's link to the relay and station."""
        link = self.links[station]
        now = datetime.now(UTC)
        blocks = [
            BlockIn(str(uuid.uuid4()), os.urandom(block_bytes), 0.02, epsilon, now)
            for _ in range(n_blocks)
        ]
        for node in (self.relay, self.nodes[station]):
            # A QKD module re-sends until each end has stored the batch (a failed
            # attempt stored nothing; a repeated one counts as duplicates).
            for attempt in range(retries + 1):
                try:
                    ingest.ingest(node.ctx, link, blocks, actor="test-module", actor_link=link)
                    break
                except Exception:
                    if attempt == retries:
                        raise

    def pending(self) -> list[tuple[str, outbox.Pending]]:
        """Every due message of every node, as (sender, message), oldest first."""
        out: list[tuple[str, outbox.Pending]] = []
        far = datetime(9999, 1, 1, tzinfo=UTC)
        for name, node in self.nodes.items():
            out += [(name, m) for m in outbox.claim(node.ctx.db, now=far, limit=10_000)]
            _release(node, [m.id for _, m in out if _ == name])
        return out

    def deliver(self, sender: str, message: outbox.Pending, *, lose_reply: bool = False) -> str:
        """Carry one message to its destination; return the outcome (applied, already,
        discarded), or the error's status code when the receiver refused. On success the
        sender forgets the message unless the reply is "lost"."""
        target = self.nodes[message.destination]
        try:
            result = dispatch.handle(target.ctx, sender, dict(message.body))
        except KeystrataError as exc:
            return str(exc.status)
        if not lose_reply:
            outbox.delivered(self.nodes[sender].ctx.db, [message.id])
        return str(result.outcome)

    def drain(self, max_rounds: int = 50) -> None:
        """Deliver everything until no node has anything left that can be applied."""
        for _ in range(max_rounds):
            progress = False
            for sender, message in self.pending():
                if self.deliver(sender, message) in ("applied", "already", "discarded"):
                    progress = True
            if not progress:
                return

    def report_buffers(self) -> None:
        """What the scheduler's poll does, without HTTP."""
        for station in ("station-a", "station-b"):
            record_report(self.relay.ctx, station_report(self.nodes[station].ctx, PAIR))

    def segments(self, station: str) -> dict[str, PairSegment]:
        with self.nodes[station].ctx.db.read() as s:
            return {r.segment_id: r for r in s.execute(select(PairSegment)).scalars()}

    def key_digest(self, station: str, segment_id: str) -> str:
        """SHA-256 of a segment's remaining key at a station (tests compare digests)."""
        row = self.segments(station)[segment_id]
        assert row.sealed is not None
        ctx = self.nodes[station].ctx
        key = ctx.keyring.open(row.sealed, segment_context(row, row.used))
        return hashlib.sha256(key).hexdigest()


def _release(node: Node, ids: list[int]) -> None:
    from sqlalchemy import update

    from keystrata.storage.models import OutboxMessage

    with node.ctx.db.write() as s:
        s.execute(update(OutboxMessage).where(OutboxMessage.id.in_(ids)).values(claimed_until=None))


def provision(node: Node, policy: dict[str, Any] | None = None) -> None:
    ctx = node.ctx
    for node_id, role in (("relay-1", "relay"), ("station-a", "station"), ("station-b", "station")):
        if node_id != ctx.node_id:
            provisioning.create(
                ctx,
                Kind.NODES,
                NodeSpec.model_validate({"node_id": node_id, "role": role}),
                actor="test",
            )
    for station, link in LINKS.items():
        if ctx.node_id in ("relay-1", station):
            provisioning.create(
                ctx,
                Kind.LINKS,
                LinkSpec(link_id=link, relay_id="relay-1", station_id=station),
                actor="test",
            )
    provisioning.create(
        ctx,
        Kind.PAIRS,
        PairSpec(
            pair_id=PAIR,
            relay_id="relay-1",
            stations=["station-a", "station-b"],
            policy=PairPolicy.model_validate(policy or {}),
        ),
        actor="test",
    )
    for peer in ("relay-1", "station-a", "station-b"):
        if peer != ctx.node_id:
            provisioning.create(
                ctx,
                Kind.PRINCIPALS,
                PrincipalSpec.model_validate(
                    {
                        "principal_id": f"peer-{peer}",
                        "role": "peer",
                        "cert_subject": peer,
                        "cert_sha256": cert_pin(ctx.settings.tls.cert.parent, peer),
                        "node_id": peer,
                    }
                ),
                actor="test",
            )


def build(
    make_node: NodeFactory,
    new_db: Callable[[], str],
    policy: dict[str, Any] | None = None,
    relay_extra: str = "",
) -> RelayNet:
    relay = make_node("relay-1", "relay", db_url=new_db(), extra=relay_extra)
    a = make_node("station-a", "station", db_url=new_db())
    b = make_node("station-b", "station", db_url=new_db())
    for node in (relay, a, b):
        provision(node, policy)
    return RelayNet(relay=relay, a=a, b=b)


def add_third_station(net: RelayNet, c: Node, *, priority: int) -> None:
    """Add station-c with link-c and pair-bc (station-b with station-c) at the relay, at
    station-b and at station-c itself."""
    LINKS_C = {"station-c": "link-c"}
    for node in (net.relay, net.b, c):
        ctx = node.ctx
        for node_id, role in (
            ("relay-1", "relay"),
            ("station-b", "station"),
            ("station-c", "station"),
        ):
            if node_id != ctx.node_id and not _has(ctx, Kind.NODES, node_id):
                provisioning.create(
                    ctx,
                    Kind.NODES,
                    NodeSpec.model_validate({"node_id": node_id, "role": role}),
                    actor="test",
                )
        if ctx.node_id in ("relay-1", "station-c"):
            provisioning.create(
                ctx,
                Kind.LINKS,
                LinkSpec(link_id="link-c", relay_id="relay-1", station_id="station-c"),
                actor="test",
            )
        provisioning.create(
            ctx,
            Kind.PAIRS,
            PairSpec(
                pair_id="pair-bc",
                relay_id="relay-1",
                stations=["station-b", "station-c"],
                policy=PairPolicy.model_validate(
                    {
                        "priority": priority,
                        "buffer_min_bits": 0,
                        "buffer_target_bits": 10**9,
                        "buffer_max_bits": 10**9,
                    }
                ),
            ),
            actor="test",
        )
    net.links.update(LINKS_C)
    net.extra["station-c"] = c


def _has(ctx: Any, kind: Kind, key: str) -> bool:
    try:
        provisioning.get(ctx, kind, key)
        return True
    except KeystrataError:
        return False


def report_third(net: RelayNet, c: Node) -> None:
    for node in (net.b, c):
        record_report(net.relay.ctx, station_report(node.ctx, "pair-bc"))


SAES = {"sae-a1": "station-a", "sae-a2": "station-a", "sae-b1": "station-b", "sae-b2": "station-b"}


def add_person(node: Any, pid: str, role: str) -> None:
    """Register the test certificate ``pid`` at ``node`` as a principal of ``role``,
    pinned to the certificate."""
    provisioning.create(
        node.ctx,
        Kind.PRINCIPALS,
        PrincipalSpec.model_validate(
            {
                "principal_id": pid,
                "role": role,
                "cert_subject": pid,
                "cert_sha256": cert_pin(node.ctx.settings.tls.cert.parent, pid),
            }
        ),
        actor="test",
    )


def provision_saes(net: RelayNet) -> None:
    """The test SAEs at both stations (each station knows its partner's SAEs), and the
    test operator and auditor."""
    for node in (net.a, net.b):
        for pid, role in (("ops-ada", "operator"), ("aud-ben", "auditor")):
            add_person(node, pid, role)
        for sae, station in SAES.items():
            provisioning.create(
                node.ctx,
                Kind.PRINCIPALS,
                PrincipalSpec.model_validate(
                    {"principal_id": sae, "role": "sae", "cert_subject": sae, "station_id": station}
                ),
                actor="test",
            )


def ready_key(net: RelayNet, segments: int = 6, size: int = 4096) -> None:
    """Make ready pair key at both stations: several segments, owners alternating."""
    from keystrata.relay.planning import choose_owner

    net.feed("station-a", segments * 2)
    net.feed("station-b", segments * 2)
    owned = {"station-a": 0, "station-b": 0}
    for _ in range(segments):
        owner = choose_owner("station-a", "station-b", 0, 0, owned["station-a"], owned["station-b"])
        operation.make_segment(net.relay.ctx, PAIR, size, owner=owner)
        owned[owner] += size
    net.drain()


def with_ready_key(make_node: NodeFactory, new_db: Callable[[], str]) -> RelayNet:
    """The network with the test SAEs at the stations and ready pair key at both (the
    key delivery tests' network)."""
    net = build(make_node, new_db)
    provision_saes(net)
    ready_key(net)
    return net
