"""The relay's scheduler: keep every pair's ready buffer near its target, sharing scarce
link key among pairs by weighted max-min fairness.

One cycle: ask each station for its buffer report, compute each pair's deficit (target
minus ready key minus key on its way), share the link key the relay holds by
:func:`keystrata.relay.fairness.allocate`, and run relay operations for the shares.
Only the holder of the ``relay-scheduler`` lease runs cycles, so exactly one scheduler
acts per relay however many worker processes there are.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

from keystrata.config import RelaySection
from keystrata.context import NodeContext
from keystrata.errors import Conflict, InvalidInput
from keystrata.links import consume
from keystrata.peering import answers
from keystrata.peering.client import PeerClient
from keystrata.relay import arithmetic, buffers, operation, planning
from keystrata.relay.fairness import PairDemand, allocate
from keystrata.relay.planning import choose_owner
from keystrata.storage.models import Pair

log = logging.getLogger("keystrata.scheduler")

LEASE = "relay-scheduler"
#: No segment is smaller than this, whatever the deficit (a few bytes are not worth three
#: messages and a confirmation).
MIN_BYTES = 64


@dataclass(frozen=True)
class CycleReport:
    made: list[operation.SegmentMade]
    skipped: dict[str, str]


def _poll_stations(ctx: NodeContext, peers: PeerClient, pairs: list[Pair]) -> None:
    reports: list[answers.BufferReport] = []
    for pair in pairs:
        for station in (pair.station_a, pair.station_b):
            raw = peers.pair_buffer(station, pair.pair_id)
            if raw is None:
                continue
            try:
                report = answers.BufferReport.from_json(raw)
            except InvalidInput as exc:
                log.warning("scheduler: malformed buffer report from %s: %s", station, exc.message)
                continue
            if report.station != station or report.pair_id != pair.pair_id:
                log.warning(
                    "scheduler: %s answered with a report of another pair or station", station
                )
                continue
            reports.append(report)
    buffers.record_reports(ctx, reports)


def schedule_once(
    ctx: NodeContext, peers: PeerClient | None, *, actor: str = "scheduler"
) -> CycleReport:
    """Run one scheduling cycle (the caller holds the lease). ``peers=None`` skips
    polling and uses the last reports (tests drive stations by hand)."""
    cfg = ctx.settings.relay
    skipped: dict[str, str] = {}
    with ctx.db.read() as s:
        pairs = buffers.pairs_through(s, ctx.node_id)
        in_flight = operation.segments_in_flight(s)
        for pair in pairs:
            if in_flight.get(pair.pair_id, 0) >= cfg.max_in_flight_segments:
                skipped[pair.pair_id] = "segments on their way at the limit"
        # A pair that can get no segment this cycle is neither polled nor viewed, and
        # its links are not summed: a relay whose segments wait for the stations costs
        # two small queries per cycle, not two requests, a commit and a sum over blocks.
        pairs = [pair for pair in pairs if pair.pair_id not in skipped]
        if not pairs:
            return CycleReport(made=[], skipped=skipped)
        stations = [st for pair in pairs for st in (pair.station_a, pair.station_b)]
        links = operation.links_to(s, ctx.node_id, stations)
        free = consume.free_bytes(s, links.values())
    for pair in pairs:
        if pair.station_a not in links or pair.station_b not in links:
            skipped[pair.pair_id] = "a station has no active QKD link to this relay"
    pairs = [pair for pair in pairs if pair.pair_id not in skipped]
    if not pairs:
        return CycleReport(made=[], skipped=skipped)
    if peers is not None:
        _poll_stations(ctx, peers, pairs)
    views = {v.pair_id: v for v in buffers.relay_view(ctx)}
    demands: list[PairDemand] = []
    for pair in pairs:
        view = views[pair.pair_id]
        if any(side["ready_bits"] is None for side in view.sides):
            skipped[pair.pair_id] = "waiting for both stations' buffer reports"
            continue
        # Both stations hold the same ready segments; they differ only by allocations on
        # their way. The larger report counts, so one station reporting an empty buffer
        # cannot by itself make the relay spend its partner's link key.
        ready = max(int(side["ready_bits"]) for side in view.sides)
        side_a, side_b = view.sides
        deficit_bits = planning.pair_deficit(
            target=view.target_bits,
            ready=ready,
            in_flight=view.in_flight_bits,
            demand_a=float(side_a["demand_bps"] or 0.0),
            demand_b=float(side_b["demand_bps"] or 0.0),
            owned_a=int(side_a["owned_ready_bits"] or 0),
            owned_b=int(side_b["owned_ready_bits"] or 0),
        )
        if deficit_bits <= 0:
            continue
        demands.append(
            PairDemand(
                pair_id=pair.pair_id,
                links=(links[pair.station_a], links[pair.station_b]),
                weight=pair.priority,
                demand=-(-deficit_bits // 8),
            )
        )
    # Keep back the 32-byte MAC keys the segments of this cycle may need.
    reserve = {
        link: arithmetic.MAC_KEY_BYTES
        * cfg.max_in_flight_segments
        * sum(1 for d in demands if link in d.links)
        for link in free
    }
    budget = {link: max(0, free[link] - reserve[link]) for link in free}
    shares = allocate(demands, budget)
    made: list[operation.SegmentMade] = []
    for demand in sorted(demands, key=lambda d: d.pair_id):
        plan = _plan(
            cfg,
            views[demand.pair_id],
            shares.get(demand.pair_id, 0),
            demand.demand,
            in_flight.get(demand.pair_id, 0),
        )
        error = _make(ctx, demand.pair_id, plan, actor, made)
        if error is not None:  # link key short, or epsilon above the pair's limit
            skipped[demand.pair_id] = error
    return CycleReport(made=made, skipped=skipped)


def _plan(
    cfg: RelaySection, view: buffers.PairView, left: int, still_needed: int, count: int
) -> list[operation.Planned]:
    """The segments (size, owner) of one pair's share ``left`` this cycle."""
    plan: list[operation.Planned] = []
    a, b = view.sides
    # Owned key per side: the stations' last reports plus what this cycle adds.
    owned = {
        a["station"]: int(a["owned_ready_bits"] or 0),
        b["station"]: int(b["owned_ready_bits"] or 0),
    }
    demand_a, demand_b = float(a["demand_bps"] or 0.0), float(b["demand_bps"] or 0.0)
    while left >= MIN_BYTES and count < cfg.max_in_flight_segments:
        n = min(cfg.segment_bytes, left)
        if n < cfg.min_segment_bytes and left < still_needed:
            # Key is scarce: wait for enough to make a segment worth its messages,
            # unless this small piece is all the pair still needs.
            break
        # Each side owns key in proportion to its stations' recent demand (Get key
        # there); equal shares while neither side has any.
        owner = choose_owner(
            a["station"], b["station"], demand_a, demand_b, owned[a["station"]], owned[b["station"]]
        )
        # No bigger than the owner's gap to its share of what the pair will own, so
        # one cycle can give both sides key.
        share = planning.owned_share(demand_a, demand_b)
        if owner == b["station"]:
            share = 1 - share
        gap = -(-(share * (sum(owned.values()) + 8 * left) - owned[owner]) // 8)
        n = min(n, max(cfg.min_segment_bytes, int(gap)))
        plan.append(operation.Planned(n, owner))
        owned[owner] += 8 * n
        left -= n
        still_needed -= n
        count += 1
    return plan


def _make(
    ctx: NodeContext,
    pair_id: str,
    plan: list[operation.Planned],
    actor: str,
    made: list[operation.SegmentMade],
) -> str | None:
    """Make the planned segments in transactions of about
    :data:`operation.BATCH_BYTES` each (``made`` grows); the reason it stopped early,
    if it did."""
    i = 0
    while i < len(plan):
        j, size = i + 1, plan[i].n
        while j < len(plan) and size + plan[j].n <= operation.BATCH_BYTES:
            size += plan[j].n
            j += 1
        try:
            done, error = operation.make_segments(ctx, pair_id, plan[i:j], actor=actor)
        except Conflict as exc:
            return exc.message
        made += done
        if error is not None:
            return error.message
        i = j
    return None
