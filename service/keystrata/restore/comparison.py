"""Restore detection at a station: compare each pair's consumption points with the
partner's (rules in :mod:`keystrata.restore.rules`, points from
:mod:`keystrata.restore.points`) and record what was found as pair holds
(:mod:`keystrata.restore.holds`), which an operator releases without serving any byte
again (:mod:`keystrata.restore.release`).

* A finding about this station itself (``behind = self``) holds the pair: Get key and
  Get key with key IDs answer 503 for it, the buffer report to the relay answers 503
  (the relay is told nothing new), until an operator releases it.
* A finding about the partner is recorded and alerted the same way, but this station
  keeps serving: it cannot serve a byte twice because of the partner's loss (keys the
  partner re-allocates from bytes we already used are refused here, offset < used).
  It closes by itself when a later comparison is clean (the partner was released).
"""

from __future__ import annotations

import logging
from typing import Any

from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.restore.points import (
    ProgressSource,
    fetched_keys,
    own_points,
    pair_and_partner,
    partner_mark,
    partner_progress,
)
from keystrata.restore.rules import Behind, Finding, compare, deliveries
from keystrata.storage.models import Pair, PairHold, PartnerMark

log = logging.getLogger("keystrata.progress")


def check_pair(ctx: NodeContext, source: ProgressSource, pair_id: str) -> list[Finding] | None:
    """Compare one pair with the partner and record what was found. Returns the findings,
    or None when the partner could not be asked."""
    with ctx.db.read() as s:
        found = pair_and_partner(s, ctx, pair_id)
    if found is None:
        return None
    partner = found[1]
    before = own_points(ctx, pair_id, partner)
    theirs = partner_progress(ctx, source, pair_id, partner)
    if theirs is None:
        return None
    after = own_points(ctx, pair_id, partner)
    with ctx.db.read() as s:
        own_now = fetched_keys(s, pair_id, partner)
        mark = partner_mark(s, pair_id, partner).partner_fetched
    findings = compare(ctx.node_id, before, theirs.points, after) + deliveries(
        own_now, theirs.seen_fetched, theirs.fetched_keys, mark
    )
    _record_findings(ctx, pair_id, partner, findings, partner_fetched=theirs.fetched_keys)
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
            found = pair_and_partner(s, ctx, pair_id)
        if found is None or (only is not None and found[1] not in only):
            continue
        if check_pair(ctx, source, pair_id) is None:
            missed.add(found[1])
            log.info("restore check: %s not compared (partner unreachable)", pair_id)
    return missed


def _record_findings(
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
                _raise_partner_mark(s, pair_id, partner, partner_fetched, now)
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
                entries.append((now, Event.PAIR_HELD, _finding_fields(pair_id, partner, f)))
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


def _raise_partner_mark(s: Session, pair_id: str, partner: str, fetched: int, now: Any) -> None:
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


def _finding_fields(pair_id: str, partner: str, f: Finding) -> dict[str, Any]:
    return {
        "pair": pair_id,
        "partner": partner,
        "behind": f.behind.value,
        "reason": f.reason.value,
        "segments": f.segments,
        "bytes": f.bytes_behind,
    }
