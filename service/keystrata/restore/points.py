"""This station's consumption points of a pair, as reported to the partner, and the
partner's points as read from it (the inputs of :mod:`keystrata.restore.comparison`).

A point is how far one segment of the pair's key is used here, with the bytes of key
allocations still queued for the partner (``unacked``). The first page of a report also
says how many keys this station has served of the partner's ownership, and the highest
such count it has seen from the partner (the partner mark).
"""

from __future__ import annotations

import json
import logging
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any, Protocol

from sqlalchemy import func, select, text
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.errors import Forbidden, InvalidInput
from keystrata.peering import answers
from keystrata.restore.rules import Point
from keystrata.storage.models import KeyAlloc, OutboxMessage, Pair, PairSegment, PartnerMark

log = logging.getLogger("keystrata.progress")

#: Segments per page of the peer route (bounded answers).
PAGE = 1000
#: Pages one comparison reads at most: a pair with more segments is compared in part.
MAX_PAGES = 1000


class ProgressSource(Protocol):
    """The port to a partner station's consumption points (the peer client)."""

    def pair_progress(
        self, node_id: str, pair_id: str, after: str | None, timeout: float
    ) -> dict[str, Any] | None: ...


@dataclass(frozen=True)
class PartnerProgress:
    """The partner's points, and what its first page says of served keys."""

    points: dict[str, Point]
    fetched_keys: int | None
    seen_fetched: int | None


def pair_and_partner(s: Session, ctx: NodeContext, pair_id: str) -> tuple[Pair, str] | None:
    """Return the pair and its other station, or None when this station is not in it."""
    pair = s.get(Pair, pair_id)
    if pair is None or ctx.node_id not in (pair.station_a, pair.station_b):
        return None
    return pair, pair.station_b if pair.station_a == ctx.node_id else pair.station_a


def _read_one_snapshot(s: Session, backend: str) -> None:
    # One snapshot for the points and the outbox: under READ COMMITTED an
    # acknowledgement between two statements would make ``unacked`` too small.
    # (SQLite in WAL mode keeps one snapshot per read transaction already.)
    if backend == "postgresql":
        s.execute(text("SET TRANSACTION ISOLATION LEVEL REPEATABLE READ"))


def _unacked_bytes(s: Session, pair_id: str, partner: str) -> dict[str, int]:
    """Bytes per segment of ``pair_id`` in key allocations still queued for ``partner``."""
    out: dict[str, int] = {}
    bodies = s.execute(
        select(OutboxMessage.body).where(
            OutboxMessage.destination == partner, OutboxMessage.kind == "key.allocated"
        )
    ).scalars()
    for raw in bodies:
        for seg, length in _allocated_ranges(json.loads(raw), pair_id):
            out[seg] = out.get(seg, 0) + length
    return out


def _allocated_ranges(body: Any, pair_id: str) -> Iterator[tuple[str, int]]:
    if not isinstance(body, dict) or body.get("pair_id") != pair_id:
        return
    for key in body.get("keys") or ():
        for r in key.get("ranges") or () if isinstance(key, dict) else ():
            if isinstance(r, dict):
                yield str(r.get("segment")), int(r.get("length", 0))


def _points_page(
    s: Session, ctx: NodeContext, pair_id: str, partner: str, after: str | None, limit: int
) -> list[Point]:
    query = select(PairSegment.segment_id, PairSegment.owner, PairSegment.used).where(
        PairSegment.pair_id == pair_id
    )
    if after is not None:
        query = query.where(PairSegment.segment_id > after)
    rows = s.execute(query.order_by(PairSegment.segment_id).limit(limit)).all()
    unacked = _unacked_bytes(s, pair_id, partner) if rows else {}
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
        _read_one_snapshot(s, ctx.db.backend)
        found = pair_and_partner(s, ctx, pair_id)
        if found is None or found[1] != caller_node:
            raise Forbidden("only the pair's other station may read its progress")
        points = _points_page(s, ctx, pair_id, caller_node, after, PAGE)
        first = after is None
        fetched = fetched_keys(s, pair_id, caller_node) if first else None
        seen = partner_mark(s, pair_id, caller_node).partner_fetched if first else None
    return answers.ProgressReport(
        pair_id=pair_id,
        station=ctx.node_id,
        points=[
            answers.ProgressPoint(
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
    return int(served) + partner_mark(s, pair_id, owner).own_floor


def partner_mark(s: Session, pair_id: str, partner: str) -> PartnerMark:
    """The partner's mark (unsaved zeros when there is none yet)."""
    row = s.get(PartnerMark, (pair_id, partner))
    if row is None:
        return PartnerMark(pair_id=pair_id, partner=partner, partner_fetched=0, own_floor=0)
    return row


def own_points(ctx: NodeContext, pair_id: str, partner: str) -> dict[str, Point]:
    """Every page of this station's points of ``pair_id``, read in one snapshot."""
    out: dict[str, Point] = {}
    after: str | None = None
    with ctx.db.read() as s:
        _read_one_snapshot(s, ctx.db.backend)
        for _ in range(MAX_PAGES):
            page = _points_page(s, ctx, pair_id, partner, after, PAGE)
            out.update((p.segment_id, p) for p in page)
            if len(page) < PAGE:
                break
            after = page[-1].segment_id
    return out


def _checked_page(raw: Any, pair_id: str, partner: str) -> answers.ProgressReport:
    page = answers.ProgressReport.from_json(raw)
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
    first: answers.ProgressReport | None = None
    after: str | None = None
    for _ in range(MAX_PAGES):
        raw = source.pair_progress(partner, pair_id, after, timeout)
        if raw is None:
            return None
        try:
            page = _checked_page(raw, pair_id, partner)
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
