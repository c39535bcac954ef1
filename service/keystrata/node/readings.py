"""What this node shows now, read once for the dashboard's overview and for its history
(node/history.py), so that a plotted value and the live figure beside it come from the
same reading.

Every figure is read by the code that already computes it: pool levels, rates and QBER
(links/pools.py), planned against observed (supply/observed.py), pair buffers and the
relay's view of them (relay/buffers.py), delivery counts (delivery/accounting.py).

Nothing here holds key material or key IDs: levels, rates, counts and identifiers an
operator provisioned.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

from keystrata.config import Role
from keystrata.context import NodeContext
from keystrata.delivery import accounting
from keystrata.links import pools
from keystrata.relay import buffers
from keystrata.supply import observed


@dataclass(frozen=True, slots=True)
class LinkReading:
    """One QKD link ending at this node.

    Attributes:
        rate_bps: link key received per second over the rate window.
        planned_bps: the link model's clear-sky rate for now (``None`` without a
            complete profile); ``plan_ratio`` is rate over plan (``None`` when nothing
            is planned); ``far_below`` the readiness check's verdict.
        qber: mean QBER of the blocks received over the rate window (``None``: none).
    """

    link_id: str
    peer_node_id: str
    rate_bps: float
    bits_available: int
    bits_received: int
    bits_used: int
    window_seconds: int
    last_block_at: str | None
    planned_bps: float | None
    plan_ratio: float | None
    far_below: bool
    qber: float | None


@dataclass(frozen=True, slots=True)
class PairReading:
    """One pair, as this node sees it.

    At a station: this station's ready key (``owned_bits`` of it served to its own
    masters), key waiting for confirmation, its masters' demand over the rate window and
    how long the owned key lasts at that demand. At the relay: the last ready figures
    each station reported, the target the scheduler aims at, key on its way, the relay
    rate and the time until the smaller buffer is empty at both stations' demand.
    ``None`` where this node does not know the figure.
    """

    pair_id: str
    stations: tuple[str, str]
    ready_bits: int | None
    owned_bits: int | None
    pending_bits: int | None
    ready_by_station: dict[str, int | None]
    target_bits: int | None
    in_flight_bits: int | None
    relayed_bps: float | None
    demand_bps: float | None
    time_until_empty_s: float | None


@dataclass(frozen=True, slots=True)
class Readings:
    at: datetime
    links: list[LinkReading]
    pairs: list[PairReading]
    #: Per pair at a station: keys handed to masters and fetched by slaves (cumulative),
    #: waiting and expired, as delivery/accounting.py counts them; empty at a relay.
    deliveries: list[dict[str, Any]]


def read(ctx: NodeContext) -> Readings:
    """Read every figure of this node now.

    Raises:
        Unavailable: the database cannot be reached.
    """
    at = ctx.clock.now()
    levels = pools.pool_levels(ctx)
    checks = {c.link_id: c for c in observed.plan_checks(ctx, levels)}
    links = [
        LinkReading(
            link_id=level.link_id,
            peer_node_id=level.peer_node_id,
            rate_bps=level.rate_bps,
            bits_available=level.bits_available,
            bits_received=level.bits_received,
            bits_used=level.bits_used,
            window_seconds=level.window_seconds,
            last_block_at=level.last_block_at,
            planned_bps=checks[level.link_id].planned_bps,
            plan_ratio=checks[level.link_id].ratio,
            far_below=checks[level.link_id].far_below,
            qber=level.qber,
        )
        for level in levels
    ]
    if ctx.role is Role.RELAY:
        return Readings(at=at, links=links, pairs=_relay_pairs(ctx, at), deliveries=[])
    report = accounting.deliveries(ctx)
    return Readings(at=at, links=links, pairs=_station_pairs(ctx), deliveries=report["pairs"])


def _relay_pairs(ctx: NodeContext, at: datetime) -> list[PairReading]:
    out = []
    for view in buffers.relay_view(ctx, now=at):
        by_station = {side["station"]: side["ready_bits"] for side in view.sides}
        known = [v for v in by_station.values() if v is not None]
        a, b = view.stations
        out.append(
            PairReading(
                pair_id=view.pair_id,
                stations=(a, b),
                ready_bits=min(known) if len(known) == 2 else None,
                owned_bits=None,
                pending_bits=None,
                ready_by_station=by_station,
                target_bits=view.target_bits,
                in_flight_bits=view.in_flight_bits,
                relayed_bps=view.relay_rate_bps,
                demand_bps=view.consumption_bps,
                time_until_empty_s=view.time_until_empty_s,
            )
        )
    return out


def _station_pairs(ctx: NodeContext) -> list[PairReading]:
    out = []
    for view in buffers.station_view(ctx):
        report = buffers.station_report(ctx, view["pair_id"])
        demand = buffers.demand_bps(report)
        a, b = sorted((ctx.node_id, view["partner"]))
        out.append(
            PairReading(
                pair_id=view["pair_id"],
                stations=(a, b),
                ready_bits=view["ready_bits"],
                owned_bits=view["owned_ready_bits"],
                pending_bits=view["pending_bits"],
                ready_by_station={ctx.node_id: view["ready_bits"]},
                target_bits=None,
                in_flight_bits=None,
                relayed_bps=None,
                demand_bps=demand,
                time_until_empty_s=view["owned_ready_bits"] / demand if demand else None,
            )
        )
    return out
