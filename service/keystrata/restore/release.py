"""An operator's release of a pair held by the restore check (restore/comparison.py).

Releasing must not serve any byte again, so in one transaction, with the partner's
current points in hand:

* ``owner_behind``: every segment this station owns is advanced to the partner's
  consumption point; the bytes in between (handed out before the loss, under key IDs
  this station forgot) are destroyed.
* ``non_owner_behind``: every segment the partner owns is advanced to the point the
  partner knows was applied here, and every key of the pair still waiting here for
  slaves is destroyed (state ``expired``): after the loss this station cannot tell
  which of them were already fetched.
* ``deliveries_lost``: the same keys are destroyed, and this station's count of served
  keys is raised to what the partner saw (``partner_mark.own_floor``).

The hold rows are closed with the operator and the reason, and one ledger entry records
the release with counts only.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import select

from keystrata.context import NodeContext
from keystrata.errors import Conflict, InvalidInput, Unavailable
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.relay.segment_states import SegmentState
from keystrata.restore.points import ProgressSource, fetched_keys, partner_progress
from keystrata.restore.rules import Behind, Reason
from keystrata.storage.models import KeyAlloc, PairHold, PairSegment, PartnerMark
from keystrata.storage.sealed import segment_context

MAX_REASON = 200


def release(
    ctx: NodeContext, source: ProgressSource, pair_id: str, *, actor: str, reason: str
) -> dict[str, Any]:
    """Release the open holds of ``pair_id`` at this station; return what was done.

    Raises:
        InvalidInput: the reason is empty, too long or not printable (400).
        Conflict: the pair is not held at this station (409).
        Unavailable: the partner cannot be asked for its points now (503).
    """
    reason = reason.strip()
    if not reason or len(reason) > MAX_REASON or not reason.isprintable():
        raise InvalidInput(f"reason: 1 to {MAX_REASON} printable characters")
    with ctx.db.read() as s:
        holds = (
            s.execute(
                select(PairHold).where(
                    PairHold.pair_id == pair_id,
                    PairHold.released_at.is_(None),
                    PairHold.behind == Behind.SELF.value,
                )
            )
            .scalars()
            .all()
        )
    if not holds:
        raise Conflict("this pair is not held at this station")
    partner = holds[0].partner
    progress = partner_progress(ctx, source, pair_id, partner)
    if progress is None:
        raise Unavailable("the partner station cannot be asked for its progress; try again")
    theirs = progress.points
    reasons = {h.reason for h in holds}
    now = ctx.clock.now()
    advanced = destroyed = keys = 0
    with ctx.db.write() as s:
        rows = s.execute(
            select(PairSegment)
            .where(PairSegment.pair_id == pair_id, PairSegment.state != SegmentState.DISCARDED)
            .order_by(PairSegment.segment_id)
            .with_for_update()
        ).scalars()
        for row in rows:
            other = theirs.get(row.segment_id)
            if other is None:
                continue
            target = other.used if row.owner == ctx.node_id else other.acknowledged
            if target > row.used:
                destroyed += _advance(ctx, row, min(target, row.length))
                advanced += 1
        lost = {Reason.NON_OWNER_BEHIND.value, Reason.DELIVERIES_LOST.value}
        if Reason.DELIVERIES_LOST.value in reasons:
            # What the partner saw us serve becomes our count's floor, so the next
            # comparison is in step (the forgotten deliveries cannot be counted again).
            own = fetched_keys(s, pair_id, partner)
            if progress.seen_fetched is not None and own < progress.seen_fetched:
                mark = s.get(PartnerMark, (pair_id, partner), with_for_update=True)
                if mark is None:
                    mark = PartnerMark(
                        pair_id=pair_id, partner=partner, partner_fetched=0, own_floor=0
                    )
                    s.add(mark)
                mark.own_floor += progress.seen_fetched - own
                mark.seen_at = now
        if reasons & lost:
            waiting = s.execute(
                select(KeyAlloc)
                .where(
                    KeyAlloc.pair_id == pair_id,
                    KeyAlloc.owner == partner,
                    KeyAlloc.state == "waiting",
                )
                .with_for_update()
            ).scalars()
            for key in waiting:
                key.state, key.sealed, key.settled_at = "expired", None, now
                keys += 1
        for hold in s.execute(
            select(PairHold)
            .where(
                PairHold.pair_id == pair_id,
                PairHold.released_at.is_(None),
                PairHold.behind == Behind.SELF.value,
            )
            .with_for_update()
        ).scalars():
            hold.released_at, hold.released_by, hold.release_reason = now, actor, reason
        fields = {
            "pair": pair_id,
            "partner": partner,
            "behind": Behind.SELF.value,
            "reasons": sorted(reasons),
            "actor": actor,
            "note": reason,
            "segments_advanced": advanced,
            "bytes_destroyed": destroyed,
            "keys_destroyed": keys,
        }
        chain.append(s, node_id=ctx.node_id, at=now, event=Event.PAIR_RELEASED, fields=fields)
    return {k: v for k, v in fields.items() if k != "note"}


def _advance(ctx: NodeContext, row: PairSegment, target: int) -> int:
    """Move ``row``'s consumption point to ``target``, destroying the bytes before it."""
    skipped = target - row.used
    if row.sealed is not None:
        rest = ctx.keyring.open(row.sealed, segment_context(row, row.used))
        rest = rest[skipped:]
        row.sealed = ctx.keyring.seal(rest, segment_context(row, target)) if rest else None
    row.used = target
    return skipped
