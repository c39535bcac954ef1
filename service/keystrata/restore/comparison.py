"""Restore detection at a station: compare each pair's consumption points with the
partner's (rules in :mod:`keystrata.restore.rules`), hold the pair when this station
is behind, and let an operator release the hold without serving any byte again.

* A finding about this station itself (``behind = self``) holds the pair: Get key and
  Get key with key IDs answer 503 for it, the buffer report to the relay answers 503
  (the relay is told nothing new), until an operator releases it.
* A finding about the partner is recorded and alerted the same way, but this station
  keeps serving: it cannot serve a byte twice because of the partner's loss (keys the
  partner re-allocates from bytes we already used are refused here, offset < used).
  It closes by itself when a later comparison is clean (the partner was released).
"""

from __future__ import annotations

import json
import logging
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any, Protocol

from sqlalchemy import func, select, text
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.errors import Forbidden, InvalidInput, NotYetCompared, PairHeld
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.peering import messages
from keystrata.registry.principals import Caller
from keystrata.restore.rules import Behind, Finding, Point, Reason, compare, deliveries
from keystrata.storage.models import (
    KeyAlloc,
    OutboxMessage,
    Pair,
    PairHold,
    PairSegment,
    PartnerMark,
    Principal,
)

log = logging.getLogger("keystrata.progress")

#: Segments per page of the peer route (bounded answers).
PAGE = 1000
#: Pages one comparison reads at most (a pair with more segments is compared in part
#: and the log says so).
MAX_PAGES = 1000


#: ``ctx.lanes`` key: partner stations this process has not compared a pair with since
#: it started (restore check). Their pairs serve nothing here until compared.
UNVERIFIED = "progress.unverified"


def unverified(ctx: NodeContext) -> set[str]:
    """This process's partners not yet compared since start (a shared, mutable set)."""
    found: set[str] = ctx.lanes.setdefault(UNVERIFIED, set())
    return found


class ProgressSource(Protocol):
    """The port to a partner station's consumption points (the peer client)."""

    def pair_progress(
        self, node_id: str, pair_id: str, after: str | None, timeout: float
    ) -> dict[str, Any] | None: ...


@dataclass(frozen=True)
class OpenHold:
    pair_id: str
    partner: str
    behind: str
    reason: str
    segments: int
    bytes_behind: int


# ---------------------------------------------------------------- the hot path


def refuse_if_held(ctx: NodeContext, caller: Caller, other_sae_id: str) -> None:
    """Raise :class:`PairHeld` (503) when the pair between this station and the station
    of ``other_sae_id`` is held because this station is behind. One indexed read;
    requests that are not from an SAE of this station go on to be refused as usual.
    """
    if caller.role.value != "sae" or caller.station_id != ctx.node_id:
        return
    pending = unverified(ctx)
    with ctx.db.read() as s:
        if pending:
            other = s.get(Principal, other_sae_id)
            if other is not None and other.station_id in pending:
                raise NotYetCompared()
        partner = select(Principal.station_id).where(Principal.principal_id == other_sae_id)
        held = s.execute(
            select(PairHold.id)
            .where(
                PairHold.released_at.is_(None),
                PairHold.behind == Behind.SELF.value,
                PairHold.partner == partner.scalar_subquery(),
            )
            .limit(1)
        ).first()
    if held is not None:
        raise PairHeld()


def refuse_pair_if_held(ctx: NodeContext, pair_id: str) -> None:
    """Raise :class:`PairHeld` when ``pair_id`` is held because this station is behind."""
    if pair_id in {h.pair_id for h in open_holds(ctx) if h.behind == Behind.SELF.value}:
        raise PairHeld()
    pending = unverified(ctx)
    if pending:
        with ctx.db.read() as s:
            found = _pair_and_partner(s, ctx, pair_id)
        if found is not None and found[1] in pending:
            raise NotYetCompared()


def open_holds(ctx: NodeContext) -> list[OpenHold]:
    """Every open finding at this station, by pair."""
    with ctx.db.read() as s:
        rows = s.execute(
            select(PairHold).where(PairHold.released_at.is_(None)).order_by(PairHold.id)
        ).scalars()
        return [
            OpenHold(r.pair_id, r.partner, r.behind, r.reason, r.segments, r.bytes_behind)
            for r in rows
        ]


# ---------------------------------------------------------------- what we report


def _pair_and_partner(s: Session, ctx: NodeContext, pair_id: str) -> tuple[Pair, str] | None:
    pair = s.get(Pair, pair_id)
    if pair is None or ctx.node_id not in (pair.station_a, pair.station_b):
        return None
    return pair, pair.station_b if pair.station_a == ctx.node_id else pair.station_a


def _snapshot(s: Session, backend: str) -> None:
    # One snapshot for the points and the outbox: under READ COMMITTED an
    # acknowledgement between two statements would make ``unacked`` too small.
    # (SQLite in WAL mode keeps one snapshot per read transaction already.)
    if backend == "postgresql":
        s.execute(text("SET TRANSACTION ISOLATION LEVEL REPEATABLE READ"))


def _unacked(s: Session, pair_id: str, partner: str) -> dict[str, int]:
    """Bytes per segment of ``pair_id`` in key allocations still queued for ``partner``."""
    out: dict[str, int] = {}
    bodies = s.execute(
        select(OutboxMessage.body).where(
            OutboxMessage.destination == partner, OutboxMessage.kind == "key.allocated"
        )
    ).scalars()
    for raw in bodies:
        for seg, length in _ranges(json.loads(raw), pair_id):
            out[seg] = out.get(seg, 0) + length
    return out


def _ranges(body: Any, pair_id: str) -> Iterator[tuple[str, int]]:
    if not isinstance(body, dict) or body.get("pair_id") != pair_id:
        return
    for key in body.get("keys") or ():
        for r in key.get("ranges") or () if isinstance(key, dict) else ():
            if isinstance(r, dict):
                yield str(r.get("segment")), int(r.get("length", 0))


def _points(
    s: Session, ctx: NodeContext, pair_id: str, partner: str, after: str | None, limit: int
) -> list[Point]:
    query = select(PairSegment.segment_id, PairSegment.owner, PairSegment.used).where(
        PairSegment.pair_id == pair_id
    )
    if after is not None:
        query = query.where(PairSegment.segment_id > after)
    rows = s.execute(query.order_by(PairSegment.segment_id).limit(limit)).all()
    unacked = _unacked(s, pair_id, partner) if rows else {}
    return [
        Point(seg, owner, int(used), unacked.get(seg, 0) if owner == ctx.node_id else 0)
        for seg, owner, used in rows
    ]


def report(ctx: NodeContext, caller_node: str, pair_id: str, after: str | None) -> dict[str, Any]:
    """The consumption points of ``pair_id`` here, one page, for the pair's other station.

    Raises:
        Forbidden: the caller is not the other station of this pair (or no such pair).
    """
    with ctx.db.read() as s:
        _snapshot(s, ctx.db.backend)
        found = _pair_and_partner(s, ctx, pair_id)
        if found is None or found[1] != caller_node:
            raise Forbidden("only the pair's other station may read its progress")
        points = _points(s, ctx, pair_id, caller_node, after, PAGE)
        first = after is None
        fetched = fetched_keys(s, pair_id, caller_node) if first else None
        seen = _mark(s, pair_id, caller_node).partner_fetched if first else None
    return messages.ProgressReport(
        pair_id=pair_id,
        station=ctx.node_id,
        points=[
            messages.ProgressPoint(
                segment_id=p.segment_id, owner=p.owner, used=p.used, unacked=p.unacked
            )
            for p in points
        ],
        next_after=points[-1].segment_id if len(points) == PAGE else None,
        fetched_keys=fetched,
        seen_fetched=seen,
    ).to_json()


def fetched_keys(s: Session, pair_id: str, owner: str) -> int:
    """Keys of ``owner``'s ownership in ``pair_id`` this station has served to at least
    one slave, plus the floor an operator's release set (a count that only grows)."""
    served = s.execute(
        select(func.count()).where(
            KeyAlloc.pair_id == pair_id, KeyAlloc.owner == owner, KeyAlloc.fetched_by != "[]"
        )
    ).scalar_one()
    return int(served) + _mark(s, pair_id, owner).own_floor


def _mark(s: Session, pair_id: str, partner: str) -> PartnerMark:
    """The partner's mark (unsaved zeros when there is none yet)."""
    row = s.get(PartnerMark, (pair_id, partner))
    if row is None:
        return PartnerMark(pair_id=pair_id, partner=partner, partner_fetched=0, own_floor=0)
    return row


def _all_points(ctx: NodeContext, pair_id: str, partner: str) -> dict[str, Point]:
    out: dict[str, Point] = {}
    after: str | None = None
    with ctx.db.read() as s:
        _snapshot(s, ctx.db.backend)
        for _ in range(MAX_PAGES):
            page = _points(s, ctx, pair_id, partner, after, PAGE)
            out.update((p.segment_id, p) for p in page)
            if len(page) < PAGE:
                break
            after = page[-1].segment_id
    return out


@dataclass(frozen=True)
class PartnerProgress:
    """The partner's points, and what its first page says of served keys."""

    points: dict[str, Point]
    fetched_keys: int | None
    seen_fetched: int | None


def _parse_page(raw: Any, pair_id: str, partner: str) -> messages.ProgressReport:
    page = messages.ProgressReport.from_json(raw)
    if page.pair_id != pair_id or page.station != partner:
        raise InvalidInput("progress answer names another pair or station")
    return page


def partner_progress(
    ctx: NodeContext, source: ProgressSource, pair_id: str, partner: str
) -> PartnerProgress | None:
    """Every page of the partner's answer, or None when it cannot be asked now (or
    answers something malformed)."""
    timeout = ctx.settings.restore_check.peer_timeout_seconds
    out: dict[str, Point] = {}
    first: messages.ProgressReport | None = None
    after: str | None = None
    for _ in range(MAX_PAGES):
        raw = source.pair_progress(partner, pair_id, after, timeout)
        if raw is None:
            return None
        try:
            page = _parse_page(raw, pair_id, partner)
        except InvalidInput as exc:
            log.warning("restore check: malformed progress answer from %s: %s", partner, exc)
            return None
        first = first or page
        out.update(
            (p.segment_id, Point(p.segment_id, p.owner, p.used, p.unacked)) for p in page.points
        )
        if page.next_after is None or not page.points:
            break
        after = page.next_after
    assert first is not None
    return PartnerProgress(out, first.fetched_keys, first.seen_fetched)


def partner_points(
    ctx: NodeContext, source: ProgressSource, pair_id: str, partner: str
) -> dict[str, Point] | None:
    """Every page of the partner's points, or None when it cannot be asked now."""
    got = partner_progress(ctx, source, pair_id, partner)
    return None if got is None else got.points


# ---------------------------------------------------------------- comparing


def check_pair(ctx: NodeContext, source: ProgressSource, pair_id: str) -> list[Finding] | None:
    """Compare one pair with the partner and record what was found. Returns the findings,
    or None when the partner could not be asked."""
    with ctx.db.read() as s:
        found = _pair_and_partner(s, ctx, pair_id)
    if found is None:
        return None
    partner = found[1]
    before = _all_points(ctx, pair_id, partner)
    theirs = partner_progress(ctx, source, pair_id, partner)
    if theirs is None:
        return None
    after = _all_points(ctx, pair_id, partner)
    with ctx.db.read() as s:
        own_now = fetched_keys(s, pair_id, partner)
        mark = _mark(s, pair_id, partner).partner_fetched
    findings = compare(ctx.node_id, before, theirs.points, after) + deliveries(
        own_now, theirs.seen_fetched, theirs.fetched_keys, mark
    )
    _record(ctx, pair_id, partner, findings, partner_fetched=theirs.fetched_keys)
    return findings


def check_all(
    ctx: NodeContext, source: ProgressSource, *, only: set[str] | None = None
) -> set[str]:
    """Compare every active pair of this station (with a partner in ``only``, if given);
    return the partners of the pairs that could not be compared now."""
    with ctx.db.read() as s:
        pairs = (
            s.execute(
                select(Pair.pair_id)
                .where(
                    Pair.retired_at.is_(None),
                    (Pair.station_a == ctx.node_id) | (Pair.station_b == ctx.node_id),
                )
                .order_by(Pair.pair_id)
            )
            .scalars()
            .all()
        )
    missed: set[str] = set()
    for pair_id in pairs:
        with ctx.db.read() as s:
            found = _pair_and_partner(s, ctx, pair_id)
        if found is None or (only is not None and found[1] not in only):
            continue
        if check_pair(ctx, source, pair_id) is None:
            missed.add(found[1])
            log.info("restore check: %s not compared (partner unreachable)", pair_id)
    return missed


def _record(
    ctx: NodeContext,
    pair_id: str,
    partner: str,
    findings: list[Finding],
    *,
    partner_fetched: int | None = None,
) -> None:
    now = ctx.clock.now()
    seen = {(f.behind.value, f.reason.value) for f in findings}
    try:
        with ctx.db.write() as s:
            if partner_fetched is not None:
                _raise_mark(s, pair_id, partner, partner_fetched, now)
            open_rows = {
                (r.behind, r.reason): r
                for r in s.execute(
                    select(PairHold).where(
                        PairHold.pair_id == pair_id, PairHold.released_at.is_(None)
                    )
                ).scalars()
            }
            entries = []
            for f in findings:
                if (f.behind.value, f.reason.value) in open_rows:
                    continue
                s.add(
                    PairHold(
                        pair_id=pair_id,
                        partner=partner,
                        behind=f.behind.value,
                        reason=f.reason.value,
                        segments=f.segments,
                        bytes_behind=f.bytes_behind,
                        detected_at=now,
                    )
                )
                entries.append((now, Event.PAIR_HELD, _fields(pair_id, partner, f)))
                log.error(
                    "restore check: pair %s: %s is behind (%s) on %d segments; %s",
                    pair_id,
                    "this station" if f.behind is Behind.SELF else f"partner {partner}",
                    f.reason.value,
                    f.segments,
                    "the pair is held until an operator releases it"
                    if f.behind is Behind.SELF
                    else "its operator must resolve it",
                )
            # Findings about the partner close when the partner has caught up.
            for (behind, reason), row in open_rows.items():
                if behind == Behind.PARTNER.value and (behind, reason) not in seen:
                    row.released_at, row.released_by = now, "restore-check"
                    row.release_reason = "a later comparison found the partner in step"
                    entries.append(
                        (
                            now,
                            Event.PAIR_RELEASED,
                            {
                                "pair": pair_id,
                                "partner": partner,
                                "behind": behind,
                                "reason": reason,
                                "actor": "restore-check",
                            },
                        )
                    )
            chain.append_many(s, node_id=ctx.node_id, entries=entries)
    except IntegrityError:
        pass  # another worker recorded the same finding at the same moment


def _raise_mark(s: Session, pair_id: str, partner: str, fetched: int, now: Any) -> None:
    """Keep the highest count of served keys the partner has shown (never lower it)."""
    row = s.get(PartnerMark, (pair_id, partner), with_for_update=True)
    if row is None:
        s.add(
            PartnerMark(
                pair_id=pair_id, partner=partner, partner_fetched=fetched, own_floor=0, seen_at=now
            )
        )
    elif fetched > row.partner_fetched:
        row.partner_fetched, row.seen_at = fetched, now


def _fields(pair_id: str, partner: str, f: Finding) -> dict[str, Any]:
    return {
        "pair": pair_id,
        "partner": partner,
        "behind": f.behind.value,
        "reason": f.reason.value,
        "segments": f.segments,
        "bytes": f.bytes_behind,
    }


__all__ = [
    "OpenHold",
    "ProgressSource",
    "Reason",
    "check_all",
    "check_pair",
    "open_holds",
    "partner_progress",
    "refuse_if_held",
    "report",
]
