"""The whole network's state, asked of every node of a description at once.

Each node is asked for who it is, its readiness checks (their notes are the alerts),
its link pools with the planned rate, its pair buffers and, at a station, its key
deliveries. A node that does not answer is reported as down with the reason; the
others are still shown.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

from keystrata_client._errors import KeystrataClientError
from keystrata_client._operator import OperatorClient
from keystrata_client._tls import TlsIdentity
from keystrata_client.network.description import Network


@dataclass
class NodeStatus:
    node_id: str
    role: str
    url: str | None
    up: bool = False
    error: str | None = None
    version: str | None = None
    checks: dict[str, str] = field(default_factory=dict)
    pools: list[dict[str, Any]] = field(default_factory=list)
    pairs: list[dict[str, Any]] = field(default_factory=list)
    deliveries: list[dict[str, Any]] = field(default_factory=list)

    @property
    def alerts(self) -> list[str]:
        """Readiness checks that are not plainly ``ok``: ``"check: note"``."""
        return [f"{name}: {note}" for name, note in self.checks.items() if note != "ok"]


def node_status(net: Network, node_id: str, identity: TlsIdentity, timeout: float) -> NodeStatus:
    node = net.nodes[node_id]
    out = NodeStatus(node_id, node.role, node.url)
    if node.url is None:
        out.error = "the description gives no url for this node"
        return out
    try:
        with OperatorClient(node.url, identity, timeout=timeout) as ops:
            info = ops.node_info()
            out.up = True
            if info.get("node_id") != node_id:
                out.error = f"the node at this URL is {info.get('node_id')!r}"
                return out
            out.version = str(info.get("version", ""))
            out.checks = {str(k): str(v) for k, v in ops.readiness().get("checks", {}).items()}
            out.pools = list(ops.pools().get("pools", []))
            out.pairs = list(ops.pairs().get("pairs", []))
            if node.role == "station":
                out.deliveries = list(ops.deliveries().get("pairs", []))
    except KeystrataClientError as exc:
        out.error = str(exc)
    return out


def gather(net: Network, identity: TlsIdentity, *, timeout: float = 10.0) -> list[NodeStatus]:
    """Every node's status (relays first, then stations, each by ID), asked at once."""
    order = [n.node_id for n in net.relays()] + [n.node_id for n in net.stations()]
    with ThreadPoolExecutor(max(1, min(8, len(order)))) as pool:
        jobs = [pool.submit(node_status, net, n, identity, timeout) for n in order]
        return [job.result() for job in jobs]


@dataclass(frozen=True)
class LinkRow:
    link_id: str
    relay: str
    station: str
    rate_bps: float | None  # received at the station end over the node's rate window
    qber: float | None  # mean QBER of those blocks
    planned_bps: float | None
    plan_ratio: float | None
    relay_pool_bits: int | None
    station_pool_bits: int | None


@dataclass(frozen=True)
class PairRow:
    pair_id: str
    stations: tuple[str, str]
    ready_bits: tuple[int | None, int | None]  # as each station reports it
    target_bits: int | None
    time_until_empty_s: float | None
    keys_delivered: int | None  # to masters, both stations together


def _pool(statuses: dict[str, NodeStatus], node_id: str, link_id: str) -> dict[str, Any] | None:
    s = statuses.get(node_id)
    if s is None:
        return None
    return next((p for p in s.pools if p.get("link_id") == link_id), None)


def links(net: Network, statuses: list[NodeStatus]) -> list[LinkRow]:
    by_id = {s.node_id: s for s in statuses}
    rows = []
    for link in sorted(net.links.values(), key=lambda k: k.link_id):
        at_relay = _pool(by_id, link.relay, link.link_id)
        at_station = _pool(by_id, link.station, link.link_id)
        seen = at_station or at_relay
        rows.append(
            LinkRow(
                link.link_id,
                link.relay,
                link.station,
                seen.get("rate_bps") if seen else None,
                seen.get("qber") if seen else None,
                seen.get("planned_rate_bps") if seen else None,
                seen.get("plan_ratio") if seen else None,
                at_relay.get("bits_available") if at_relay else None,
                at_station.get("bits_available") if at_station else None,
            )
        )
    return rows


def pairs(net: Network, statuses: list[NodeStatus]) -> list[PairRow]:
    by_id = {s.node_id: s for s in statuses}
    rows = []
    for pair in sorted(net.pairs.values(), key=lambda p: p.pair_id):
        relay = by_id.get(pair.relay)
        at_relay = next(
            (p for p in (relay.pairs if relay else []) if p.get("pair_id") == pair.pair_id), None
        )
        ready: list[int | None] = []
        delivered: int | None = None
        for station in pair.stations:
            s = by_id.get(station)
            mine = next(
                (p for p in (s.pairs if s else []) if p.get("pair_id") == pair.pair_id), None
            )
            ready.append(mine.get("ready_bits") if mine else None)
            counts = next(
                (d for d in (s.deliveries if s else []) if d.get("pair_id") == pair.pair_id), None
            )
            if counts is not None:
                delivered = (delivered or 0) + int(counts.get("to_masters", {}).get("keys", 0))
        rows.append(
            PairRow(
                pair.pair_id,
                pair.stations,
                (ready[0], ready[1]),
                at_relay.get("target_bits") if at_relay else None,
                at_relay.get("time_until_empty_s") if at_relay else None,
                delivered,
            )
        )
    return rows
