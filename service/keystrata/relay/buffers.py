"""Pair key buffers: what a station holds for each pair, and the relay's view of them."""

from __future__ import annotations

import threading
from collections import deque
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import case, func, select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.errors import Forbidden, NotFound
from keystrata.peering import answers
from keystrata.relay import planning
from keystrata.relay.segment_states import RelayOpState, SegmentState
from keystrata.storage.db import upsert_insert
from keystrata.storage.models import KeyAlloc, Pair, PairBuffer, PairSegment, RelayOp


def _levels(s: Session, pair_id: str, me: str) -> tuple[int, int, int]:
    left = PairSegment.length - PairSegment.used
    ready, owned, pending = s.execute(
        select(
            func.coalesce(
                func.sum(case((PairSegment.state == SegmentState.READY, left), else_=0)), 0
            ),
            func.coalesce(
                func.sum(
                    case(
                        (
                            (PairSegment.state == SegmentState.READY) & (PairSegment.owner == me),
                            left,
                        ),
                        else_=0,
                    )
                ),
                0,
            ),
            func.coalesce(
                func.sum(case((PairSegment.state == SegmentState.PENDING, left), else_=0)), 0
            ),
        ).where(PairSegment.pair_id == pair_id)
    ).one()
    return 8 * int(ready), 8 * int(owned), 8 * int(pending)


class UnmetDemand:
    """Bits this process's Get key answered 503 for lack of ready key, per pair, over the
    rate window: demand that the delivered bits cannot show (a side that owns nothing
    delivers nothing). Kept per process: an estimate, counted exactly once key flows.
    Refusals within one second share an entry and entries older than the window go, so
    a flood of refusals holds at most one entry per second of the window per pair."""

    def __init__(self, window_seconds: int) -> None:
        self._window = timedelta(seconds=window_seconds)
        self._lock = threading.Lock()
        self._asked: dict[str, deque[list[Any]]] = {}

    def note(self, pair_id: str, bits: int, at: datetime) -> None:
        with self._lock:
            asked = self._asked.setdefault(pair_id, deque())
            if asked and at - asked[-1][0] < _SAME_ENTRY:
                asked[-1][1] += bits
            else:
                asked.append([at, bits])
            self._forget_before(asked, at - self._window)

    def since(self, pair_id: str, start: datetime) -> int:
        with self._lock:
            asked = self._asked.get(pair_id)
            if not asked:
                return 0
            self._forget_before(asked, start)
            return sum(bits for _, bits in asked)

    @staticmethod
    def _forget_before(asked: deque[list[Any]], start: datetime) -> None:
        while asked and asked[0][0] < start:
            asked.popleft()


_SAME_ENTRY = timedelta(seconds=1)
_UNMET = "demand.unmet"


def unmet_demand(ctx: NodeContext) -> UnmetDemand:
    """This process's :class:`UnmetDemand` (in ``ctx.process_state``)."""
    found = ctx.process_state.get(_UNMET)
    if found is None:
        window = ctx.settings.ingest.rate_window_seconds
        found = ctx.process_state.setdefault(_UNMET, UnmetDemand(window))
    assert isinstance(found, UnmetDemand)
    return found


def station_report(ctx: NodeContext, pair_id: str) -> answers.BufferReport:
    """This station's buffer for ``pair_id``, and its demand over the rate window: the
    bits of pair key it handed to master SAEs (Get key here, from the key it owns), and
    the bits they asked for that were not ready. Raises NotFound for a pair not here."""
    window = ctx.settings.ingest.rate_window_seconds
    now = ctx.clock.now()
    with ctx.db.read() as s:
        pair = s.get(Pair, pair_id)
        if pair is None or ctx.node_id not in (pair.station_a, pair.station_b):
            raise NotFound("no such pair at this station")
        ready, owned, pending = _levels(s, pair_id, ctx.node_id)
        since = now - timedelta(seconds=window)
        delivered = _delivered_bits(s, pair_id, ctx.node_id, since)
    return answers.BufferReport(
        pair_id=pair_id,
        station=ctx.node_id,
        ready_bits=ready,
        owned_ready_bits=owned,
        pending_bits=pending,
        delivered_bits=delivered,
        unmet_bits=unmet_demand(ctx).since(pair_id, since),
        window_seconds=window,
        reported_at=now,
    )


def _delivered_bits(s: Session, pair_id: str, me: str, since: datetime) -> int:
    """Bits of ``pair_id``'s key this station allocated to its masters since ``since``."""
    return int(
        s.execute(
            select(func.coalesce(func.sum(KeyAlloc.size_bits), 0)).where(
                KeyAlloc.pair_id == pair_id,
                KeyAlloc.owner == me,
                KeyAlloc.allocated_at >= since,
            )
        ).scalar_one()
    )


def report_for_relay(ctx: NodeContext, pair_id: str, relay_id: str) -> answers.BufferReport:
    """This station's buffer for ``pair_id``, asked by peer node ``relay_id``: only the
    relay of that pair may read it (another station or relay learns nothing, not even
    whether the pair exists here).

    Raises:
        Forbidden: the pair is not relayed by ``relay_id`` at this station.
    """
    with ctx.db.read() as s:
        pair = s.get(Pair, pair_id)
        if (
            pair is None
            or ctx.node_id not in (pair.station_a, pair.station_b)
            or pair.relay_id != relay_id
        ):
            raise Forbidden("only the pair's relay reads its buffer report")
    return station_report(ctx, pair_id)


def record_report(ctx: NodeContext, report: answers.BufferReport) -> None:
    """At the relay: keep a station's latest report (upsert)."""
    record_reports(ctx, [report])


def record_reports(ctx: NodeContext, reports: list[answers.BufferReport]) -> None:
    """At the relay: keep stations' latest reports (upserts), in one transaction."""
    if not reports:
        return
    insert = upsert_insert(ctx.db.backend)
    with ctx.db.write() as s:
        for report in reports:
            values = report.model_dump(exclude={"v"})
            stmt = insert(PairBuffer).values(**values)
            s.execute(
                stmt.on_conflict_do_update(
                    index_elements=["pair_id", "station"],
                    set_={k: stmt.excluded[k] for k in values if k not in ("pair_id", "station")},
                )
            )


@dataclass(frozen=True)
class PairView:
    pair_id: str
    stations: list[str]
    priority: int
    sides: list[dict[str, Any]]
    in_flight_bits: int
    relay_rate_bps: float
    consumption_bps: float | None
    target_bits: int
    time_until_empty_s: float | None


def pairs_through(s: Session, relay_id: str) -> list[Pair]:
    """Every active pair through ``relay_id``, by pair ID."""
    return list(
        s.execute(
            select(Pair)
            .where(Pair.relay_id == relay_id, Pair.retired_at.is_(None))
            .order_by(Pair.pair_id)
        ).scalars()
    )


def demand_bps(report: PairBuffer | answers.BufferReport) -> float:
    """A station's demand for its pair: bits its masters asked for per second (delivered,
    or refused for lack of ready key), from its report (as sent, or as the relay keeps it)."""
    return (report.delivered_bits + report.unmet_bits) / max(report.window_seconds, 1)


def relay_view(ctx: NodeContext, *, now: datetime | None = None) -> list[PairView]:
    """Every active pair through this relay, as its scheduler sees it."""
    now = now or ctx.clock.now()
    cfg = ctx.settings.relay
    window = ctx.settings.ingest.rate_window_seconds
    since = now - timedelta(seconds=window)
    out: list[PairView] = []
    with ctx.db.read() as s:
        for pair in pairs_through(s, ctx.node_id):
            reports = {
                r.station: r
                for r in s.execute(
                    select(PairBuffer).where(PairBuffer.pair_id == pair.pair_id)
                ).scalars()
            }
            in_flight, made = s.execute(
                select(
                    func.coalesce(
                        func.sum(
                            case((RelayOp.state == RelayOpState.SENT, RelayOp.length), else_=0)
                        ),
                        0,
                    ),
                    func.coalesce(
                        func.sum(case((RelayOp.made_at >= since, RelayOp.length), else_=0)), 0
                    ),
                ).where(RelayOp.pair_id == pair.pair_id)
            ).one()
            sides = []
            for st in (pair.station_a, pair.station_b):
                r = reports.get(st)
                sides.append(
                    {
                        "station": st,
                        "ready_bits": r.ready_bits if r else None,
                        "owned_ready_bits": r.owned_ready_bits if r else None,
                        "pending_bits": r.pending_bits if r else None,
                        "demand_bps": demand_bps(r) if r else None,
                        "reported_at": r.reported_at.isoformat() if r else None,
                    }
                )
            consumption = None
            if len(reports) == 2 and any(demand_bps(r) for r in reports.values()):
                consumption = sum(demand_bps(r) for r in reports.values())
            ready = min(int(side["ready_bits"] or 0) for side in sides)
            target = planning.buffer_target(
                consumption_bps=consumption,
                horizon_s=cfg.horizon_seconds,
                minimum=pair.buffer_min_bits,
                default=pair.buffer_target_bits,
                maximum=pair.buffer_max_bits,
            )
            out.append(
                PairView(
                    pair_id=pair.pair_id,
                    stations=[pair.station_a, pair.station_b],
                    priority=pair.priority,
                    sides=sides,
                    in_flight_bits=8 * int(in_flight),
                    relay_rate_bps=8 * int(made) / window,
                    consumption_bps=consumption,
                    target_bits=target,
                    time_until_empty_s=(ready / consumption) if consumption else None,
                )
            )
    return out


def station_view(ctx: NodeContext) -> list[dict[str, Any]]:
    """Every active pair of this station: ready key by owner, pending key."""
    out = []
    with ctx.db.read() as s:
        pairs = (
            s.execute(select(Pair).where(Pair.retired_at.is_(None)).order_by(Pair.pair_id))
            .scalars()
            .all()
        )
        for pair in pairs:
            if ctx.node_id not in (pair.station_a, pair.station_b):
                continue
            ready, owned, pending = _levels(s, pair.pair_id, ctx.node_id)
            partner = pair.station_b if pair.station_a == ctx.node_id else pair.station_a
            out.append(
                {
                    "pair_id": pair.pair_id,
                    "partner": partner,
                    "ready_bits": ready,
                    "owned_ready_bits": owned,
                    "partner_owned_ready_bits": ready - owned,
                    "pending_bits": pending,
                }
            )
    return out
