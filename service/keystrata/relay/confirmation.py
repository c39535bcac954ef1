"""The two stations confirm a segment to each other before either serves it.

B (the cipher station) sends A its check value (``segment.check``); A compares it, turns
the segment ready and sends B its own value (``segment.confirmed``) and the relay the
outcome (``segment.settled``); B checks A's value and turns ready too. A value that does
not match discards the segment; either station may discard (``segment.discarded``) and
the other follows. A segment still pending at A when B's value never came is discarded
(:func:`expire_pending`). The relay records the outcome A reports (:func:`apply_settled`).

Check values are :func:`keystrata.crypto.hazmat.check_value` over the segment's identity
as this station holds it (:func:`keystrata.relay.segments.identity_of`). State changes
follow :mod:`keystrata.relay.segment_states`. Every handler is idempotent by segment ID:
a resent message changes nothing.
"""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.crypto.hazmat import check_value, verify_check_value
from keystrata.errors import CryptoError, Forbidden, NotFound, OutOfOrder
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.peering import messages, outbox
from keystrata.peering.messages import MessageResult
from keystrata.relay import operation
from keystrata.relay.segment_states import SegmentEvent, SegmentState, next_state
from keystrata.relay.segments import Side, discard, identity_of, pair_of_station, partner_of
from keystrata.storage.models import PairSegment
from keystrata.storage.sealed import segment_context


def _key_of(ctx: NodeContext, row: PairSegment) -> bytes:
    assert row.sealed is not None
    return ctx.keyring.open(row.sealed, segment_context(row, row.used))


def _check_sender(row: PairSegment, sender: str, pair_id: str, side: str) -> None:
    """The sender must be this segment's partner station, about this segment's pair."""
    if sender != row.partner or row.side != side or pair_id != row.pair_id:
        raise Forbidden("only the partner station of this segment's pair may send this")


def _settled_before(row: PairSegment) -> MessageResult:
    """The answer to a check value for a segment already ready or discarded."""
    outcome: messages.Outcome = "already" if row.state == SegmentState.READY else "discarded"
    return MessageResult.handled(row.segment_id, outcome)


def _partner_confirms(ctx: NodeContext, row: PairSegment, key: bytes, value: bytes) -> bool:
    """Whether ``value`` is the partner's check value for this segment and key."""
    identity = identity_of(row, ctx.node_id).canonical()
    try:
        verify_check_value(key, identity, row.partner, value)
    except CryptoError:
        return False
    return True


def _record_ready(s: Session, ctx: NodeContext, row: PairSegment, now: datetime) -> None:
    chain.append(
        s,
        node_id=ctx.node_id,
        at=now,
        event=Event.SEGMENT_READY,
        fields={
            "segment": row.segment_id,
            "pair": row.pair_id,
            "bytes": row.length,
            "owner": row.owner,
        },
    )


def apply_check(ctx: NodeContext, sender: str, msg: messages.SegmentCheck) -> MessageResult:
    """A: compare B's check value; on a match the segment is ready here, and B and the
    relay are told. On a mismatch it is discarded on both sides."""
    with ctx.db.write() as s:
        return apply_check_in(ctx, s, sender, msg)


def apply_check_in(
    ctx: NodeContext, s: Session, sender: str, msg: messages.SegmentCheck
) -> MessageResult:
    """:func:`apply_check` in the caller's write transaction."""
    segment_id = msg.segment_id
    row = s.get(PairSegment, segment_id, with_for_update=True)
    if row is None or not row.link_applied:
        raise OutOfOrder("not yet: the relay's notice for this segment has not arrived")
    _check_sender(row, sender, msg.pair_id, "notice")
    if row.state != SegmentState.PENDING:
        return _settled_before(row)
    pair = pair_of_station(s, ctx, row.pair_id)
    key = _key_of(ctx, row)
    if not _partner_confirms(ctx, row, key, msg.check):
        discard(
            s,
            ctx,
            pair=pair,
            segment_id=segment_id,
            side="notice",
            reason="check_mismatch",
            tell=[row.partner, pair.relay_id],
        )
        return MessageResult.handled(segment_id, "discarded")
    now = ctx.clock.now()
    row.state, row.settled_at = next_state(row.state, SegmentEvent.CONFIRMED), now
    confirmation = check_value(key, identity_of(row, ctx.node_id).canonical(), ctx.node_id)
    outbox.send(
        s,
        destination=row.partner,
        message=messages.SegmentConfirmed(
            segment_id=segment_id, pair_id=row.pair_id, check=confirmation
        ),
        segment_id=segment_id,
        now=now,
    )
    outbox.send(
        s,
        destination=pair.relay_id,
        message=messages.SegmentSettled(segment_id=segment_id, outcome="ready"),
        segment_id=segment_id,
        now=now,
    )
    _record_ready(s, ctx, row, now)
    return MessageResult.handled(segment_id, "applied")


def apply_confirmed(ctx: NodeContext, sender: str, msg: messages.SegmentConfirmed) -> MessageResult:
    """B: A confirmed the segment; check A's value and turn the segment ready here."""
    with ctx.db.write() as s:
        return apply_confirmed_in(ctx, s, sender, msg)


def apply_confirmed_in(
    ctx: NodeContext, s: Session, sender: str, msg: messages.SegmentConfirmed
) -> MessageResult:
    """:func:`apply_confirmed` in the caller's write transaction."""
    segment_id = msg.segment_id
    row = s.get(PairSegment, segment_id, with_for_update=True)
    if row is None:
        raise NotFound(f"no segment {segment_id} here")
    _check_sender(row, sender, msg.pair_id, "cipher")
    if row.state != SegmentState.PENDING:
        return _settled_before(row)
    pair = pair_of_station(s, ctx, row.pair_id)
    key = _key_of(ctx, row)
    now = ctx.clock.now()
    if not _partner_confirms(ctx, row, key, msg.check):
        discard(
            s,
            ctx,
            pair=pair,
            segment_id=segment_id,
            side="cipher",
            reason="confirmation_mismatch",
            tell=[row.partner],
        )
        return MessageResult.handled(segment_id, "discarded")
    row.state, row.settled_at = next_state(row.state, SegmentEvent.CONFIRMED), now
    _record_ready(s, ctx, row, now)
    return MessageResult.handled(segment_id, "applied")


def apply_discarded(ctx: NodeContext, sender: str, msg: messages.SegmentDiscarded) -> MessageResult:
    """Either station: the partner discarded the segment; do the same (idempotent).

    Only the partner of that segment, about that segment's pair: a neighbour in another
    pair cannot reach this pair's key. A discard of a segment not here yet leaves a
    tombstone bound to the pair and partner named; the relay's message of another pair
    under that ID does not honour it.
    """
    with ctx.db.write() as s:
        return apply_discarded_in(ctx, s, sender, msg)


def apply_discarded_in(
    ctx: NodeContext, s: Session, sender: str, msg: messages.SegmentDiscarded
) -> MessageResult:
    """:func:`apply_discarded` in the caller's write transaction."""
    segment_id = msg.segment_id
    pair = pair_of_station(s, ctx, msg.pair_id)
    if sender != partner_of(pair, ctx.node_id):
        raise Forbidden("only the partner station discards a segment")
    row = s.get(PairSegment, segment_id, with_for_update=True)
    side: Side = "cipher" if msg.sender_side == "notice" else "notice"
    if row is not None:
        _check_sender(row, sender, msg.pair_id, row.side)
        if row.state == SegmentState.DISCARDED:
            return MessageResult.handled(segment_id, "already")
        if row.side != side:
            raise Forbidden("sender_side: the partner holds the other side of this segment")
    discard(
        s,
        ctx,
        pair=pair,
        segment_id=segment_id,
        side=side,
        reason=msg.reason,
        tell=[pair.relay_id] if side == "notice" else [],
        notify_partner=False,
    )
    return MessageResult.handled(segment_id, "applied")


def apply_settled(ctx: NodeContext, sender: str, msg: messages.SegmentSettled) -> MessageResult:
    """Relay: the segment's notice station reports how it ended; record it once."""
    with ctx.db.write() as s:
        return apply_settled_in(ctx, s, sender, msg)


def apply_settled_in(
    ctx: NodeContext, s: Session, sender: str, msg: messages.SegmentSettled
) -> MessageResult:
    """:func:`apply_settled` in the caller's write transaction."""
    changed = operation.settle_in(ctx, s, msg.segment_id, msg.outcome, msg.reason, sender=sender)
    return MessageResult.handled(msg.segment_id, "applied" if changed else "already")


def expire_pending(ctx: NodeContext, older_than: datetime) -> int:
    """A: discard segments still pending since before ``older_than`` (B's check never
    came); B and the relay are told. Returns how many were discarded."""
    with ctx.db.write() as s:
        rows = (
            s.execute(
                select(PairSegment)
                .where(
                    PairSegment.state == SegmentState.PENDING,
                    PairSegment.side == "notice",
                    PairSegment.received_at < older_than,
                )
                .with_for_update()
            )
            .scalars()
            .all()
        )
        for row in rows:
            pair = pair_of_station(s, ctx, row.pair_id)
            discard(
                s,
                ctx,
                pair=pair,
                segment_id=row.segment_id,
                side="notice",
                reason="confirmation_timeout",
                tell=[row.partner, pair.relay_id],
            )
        return len(rows)
