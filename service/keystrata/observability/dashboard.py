"""What the operators' dashboard reads from this node: the overview of the node now, the
network its registry describes (for the map and for the nodes a network page asks), and
the browser origins of those nodes (the only origins whose pages may read the
dashboard's answers across origins).

Figures come from node/readings.py (the same reading the history samples), alerts from
the readiness checks (observability/readiness.py). Nothing here is key material or a
key ID; the registry facts are identifiers, roles, URLs and positions.
"""

from __future__ import annotations

import math
from dataclasses import asdict
from typing import Any
from urllib.parse import urlsplit

from sqlalchemy import select

from keystrata import __version__
from keystrata.context import NodeContext
from keystrata.node import readings
from keystrata.observability import readiness
from keystrata.storage.models import Pair, QkdLink, RegistryNode

#: Position fields of a registry ``physical`` profile the map uses (platform or station).
POSITION_FIELDS = (
    "latitude_deg",
    "longitude_deg",
    "altitude_m",
    "height_m",
    "station_keeping_radius_m",
)


def overview(ctx: NodeContext) -> dict[str, Any]:
    """This node now: identity and position, links (rate, QBER, pool, planned and the
    share of plan), pairs (ready, target, time until empty), deliveries, and the
    readiness checks with the notes of those that are not ``ok`` as alerts.

    Raises:
        Unavailable: the database cannot be reached.
    """
    figures = readings.read(ctx)
    result = readiness.assess(ctx)
    with ctx.db.read() as s:
        me = s.get(RegistryNode, ctx.node_id)
        description = me.description if me else ""
        position = _position(me.physical if me else None)
    alerts = [
        {"check": name, "note": value, "failing": name in result.failing}
        for name, value in result.checks.items()
        if value != readiness.OK
    ]
    return {
        "node": {
            "id": ctx.node_id,
            "role": ctx.role.value,
            "version": __version__,
            "description": description,
            "position": position,
        },
        "at": figures.at.isoformat(),
        "sample_seconds": ctx.settings.dashboard.sample_seconds,
        "window_seconds": ctx.settings.ingest.rate_window_seconds,
        "links": [_finite(asdict(link)) for link in figures.links],
        "pairs": [_finite(_pair(p)) for p in figures.pairs],
        "deliveries": [_delivery(d) for d in figures.deliveries],
        "ready": result.ready,
        "checks": result.checks,
        "alerts": alerts,
    }


def network(ctx: NodeContext) -> dict[str, Any]:
    """The network this node's registry holds: active nodes (role, description,
    position, URL and browser origin, ``self`` for this node), links and pairs. A node
    without a URL in the registry takes the URL of its ``[[peers]]`` entry, if any."""
    with ctx.db.read() as s:
        nodes = list(
            s.execute(
                select(RegistryNode)
                .where(RegistryNode.retired_at.is_(None))
                .order_by(RegistryNode.node_id)
            ).scalars()
        )
        links = list(
            s.execute(
                select(QkdLink).where(QkdLink.retired_at.is_(None)).order_by(QkdLink.link_id)
            ).scalars()
        )
        pairs = list(
            s.execute(
                select(Pair).where(Pair.retired_at.is_(None)).order_by(Pair.pair_id)
            ).scalars()
        )
    configured = {p.id: p.url for p in ctx.settings.peers}
    out_nodes = []
    for node in nodes:
        url = node.url or configured.get(node.node_id)
        out_nodes.append(
            {
                "id": node.node_id,
                "role": node.role,
                "description": node.description,
                "position": _position(node.physical),
                "self": node.node_id == ctx.node_id,
                "url": None if node.node_id == ctx.node_id else url,
                "origin": None if node.node_id == ctx.node_id else origin_of(url),
            }
        )
    return {
        "node_id": ctx.node_id,
        "nodes": out_nodes,
        "links": [
            {"id": lk.link_id, "relay": lk.relay_id, "station": lk.station_id} for lk in links
        ],
        "pairs": [
            {"id": p.pair_id, "relay": p.relay_id, "stations": [p.station_a, p.station_b]}
            for p in pairs
        ],
    }


def allowed_origins(ctx: NodeContext) -> frozenset[str]:
    """Browser origins of the other active nodes of this node's registry (their registry
    URL, else their ``[[peers]]`` URL): the pages those nodes serve may read this
    node's dashboard answers with the operator's own certificate."""
    found = network(ctx)["nodes"]
    return frozenset(n["origin"] for n in found if n["origin"] is not None)


def origin_of(url: str | None) -> str | None:
    """The browser origin (RFC 6454 section 4: scheme, host, port unless the scheme's
    default) of an ``https`` URL, or None for anything else."""
    if not url:
        return None
    try:
        parts = urlsplit(url)
        port = parts.port
    except ValueError:
        return None
    if parts.scheme != "https" or not parts.hostname:
        return None
    host = parts.hostname
    if ":" in host:  # an IPv6 literal keeps its brackets in an origin
        host = f"[{host}]"
    return f"https://{host}" + (f":{port}" if port not in (None, 443) else "")


def _position(physical: object) -> dict[str, float] | None:
    if not isinstance(physical, dict):
        return None
    out = {
        k: float(physical[k])
        for k in POSITION_FIELDS
        if isinstance(physical.get(k), int | float) and not isinstance(physical.get(k), bool)
    }
    return out if "latitude_deg" in out and "longitude_deg" in out else None


def _pair(p: readings.PairReading) -> dict[str, Any]:
    out = asdict(p)
    out["stations"] = list(p.stations)
    return out


def _delivery(d: dict[str, Any]) -> dict[str, Any]:
    """Counts of one pair (keys and bits per kind), nothing else."""
    kinds = ("to_masters", "to_slaves", "waiting", "expired")
    return {
        "pair_id": str(d["pair_id"]),
        **{k: {"keys": int(d[k]["keys"]), "bits": int(d[k]["bits"])} for k in kinds},
    }


def _finite(values: dict[str, Any]) -> dict[str, Any]:
    """JSON has no infinity or NaN: such a figure reads as unknown."""
    return {
        k: None if isinstance(v, float) and not math.isfinite(v) else v for k, v in values.items()
    }
