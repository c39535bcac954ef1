"""Pair key segments at a station: applying the relay's messages and confirming segments
with the partner station.

Roles per segment: the *notice* station (A) was told which of its link bytes form the
segment; the *cipher* station (B) got the ciphertext. A decides: it turns the segment
``ready`` only after B's check value matches, then tells B (which turns it ready on A's
check value) and the relay. Either side may discard; the other follows. A segment is
never ready on one side while discarded on the other, except when a confirmed value
fails at B, which means tampering and is recorded as such.

Every handler is idempotent by segment ID: a resent message changes nothing.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Literal

from sqlalchemy import select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.crypto.hazmat import constant_time_equal, verify_one_time_mac, xor_bytes
from keystrata.errors import CryptoError, Forbidden, InvalidInput, NotFound, OutOfOrder
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.links import consume
from keystrata.peering import messages, outbox
from keystrata.ranges import Range, total
from keystrata.relay import arithmetic
from keystrata.storage.models import Pair, PairSegment, QkdLink
from keystrata.storage.sealed import segment_context

Side = Literal["notice", "cipher"]


@dataclass(frozen=True)
class Outcome:
    segment_id: str
    status: str  # applied | already | discarded


def _pair_for(s: Session, ctx: NodeContext, pair_id: str) -> Pair:
    pair = s.get(Pair, pair_id)
    if (
        pair is None
        or pair.retired_at is not None
        or ctx.node_id not in (pair.station_a, pair.station_b)
    ):
        raise NotFound("no active pair of this station by that ID")
    return pair


def _own_link(s: Session, ctx: NodeContext, link_id: str, relay_id: str) -> None:
    link = s.get(QkdLink, link_id)
    if (
        link is None
        or link.retired_at is not None
        or link.station_id != ctx.node_id
        or link.relay_id != relay_id
    ):
        raise Forbidden("the link named is not this station's link to the pair's relay")


def _partner(pair: Pair, me: str) -> str:
    return pair.station_b if pair.station_a == me else pair.station_a


def _ranges(wire: list[messages.LinkRange]) -> list[Range]:
    return [Range(r.block, r.offset, r.length) for r in wire]


def identity_of(row: PairSegment, me: str) -> arithmetic.SegmentIdentity:
    """The segment's identity as this station holds it (what check values cover)."""
    notice, cipher = (me, row.partner) if row.side == "notice" else (row.partner, me)
    return arithmetic.SegmentIdentity(
        segment=row.segment_id,
        pair=row.pair_id,
        notice_station=notice,
        cipher_station=cipher,
        owner=row.owner,
        length=row.length,
        epsilon=row.epsilon,
    )


def _header_for(
    s: Session, ctx: NodeContext, sender: str, segment_id: str, raw: bytes, side: str
) -> tuple[Pair, messages.SegmentHeader]:
    """Parse and check a relay header against this station's registry. Raises
    InvalidInput (malformed) or Forbidden (names what is not the sender's to name)."""
    header = messages.SegmentHeader.decode(raw)
    me = header.notice_station if side == "notice" else header.cipher_station
    if header.segment != segment_id or me != ctx.node_id:
        raise InvalidInput("header: names another segment or station")
    pair = _pair_for(s, ctx, header.pair)
    if sender != pair.relay_id or header.relay != sender:
        raise Forbidden("only the pair's relay sends relay messages")
    other = header.cipher_station if side == "notice" else header.notice_station
    if other != _partner(pair, ctx.node_id):
        raise Forbidden("header: the other station is not this station's partner in the pair")
    return pair, header


def _spend(
    s: Session,
    ctx: NodeContext,
    link: str,
    pair: Pair,
    key_ranges: list[messages.LinkRange],
    mac_ranges: list[messages.LinkRange],
    n: int,
) -> tuple[bytes, bytes]:
    """Take (and destroy) the named link bytes: n key bytes and the 32-byte MAC key."""
    _own_link(s, ctx, link, pair.relay_id)
    keys, macs = _ranges(key_ranges), _ranges(mac_ranges)
    if total(keys) != n:
        raise InvalidInput("header: key ranges and bytes disagree")
    if total(macs) != arithmetic.MAC_KEY_BYTES:
        raise InvalidInput("header: MAC ranges must cover 32 bytes")
    both, _ = consume.take(s, ctx.keyring, link, keys + macs)
    return both[:n], both[n:]


def _store(
    s: Session,
    ctx: NodeContext,
    *,
    header: messages.SegmentHeader,
    pair: Pair,
    side: str,
    key: bytes,
) -> PairSegment:
    now = ctx.clock.now()
    segment_id = header.segment
    row = s.get(PairSegment, segment_id, with_for_update=True)
    partner = _partner(pair, ctx.node_id)
    forged = row is not None and (row.pair_id != pair.pair_id or row.partner != partner)
    if row is None or forged:
        # No record yet, or a tombstone some other station left under this ID for a
        # pair it is in: the relay's authenticated header decides.
        if row is None:
            row = PairSegment(segment_id=segment_id)
            s.add(row)
        row.pair_id, row.side, row.partner, row.owner = pair.pair_id, side, partner, header.owner
        row.length, row.used, row.epsilon = len(key), 0, header.epsilon
        row.state, row.reason, row.link_applied = "pending", None, True
        row.made_at, row.received_at, row.settled_at = header.made_at, now, None
        # Sealed last: the context binds the fields just set (storage/sealed.py).
        row.sealed = ctx.keyring.seal(key, segment_context(row, 0))
    else:  # the partner's discard reached us first: the link bytes are spent, no key kept
        row.link_applied, row.length, row.used, row.owner = True, len(key), len(key), header.owner
        row.epsilon = header.epsilon
    chain.append(
        s,
        node_id=ctx.node_id,
        at=now,
        event=Event.SEGMENT_RECEIVED,
        fields={
            "segment": segment_id,
            "pair": pair.pair_id,
            "side": side,
            "bytes": len(key),
            "owner": header.owner,
            "state": row.state,
        },
    )
    return row


def _bad_tag(
    s: Session, ctx: NodeContext, pair: Pair, segment_id: str, side: Side, sender: str
) -> Outcome:
    """A relay message whose one-time MAC fails: the link bytes are spent all the same
    (the link stays in step with the relay), the segment is discarded on both sides."""
    tell = [_partner(pair, ctx.node_id)] + ([pair.relay_id] if side == "notice" else [])
    _discard(s, ctx, pair=pair, segment_id=segment_id, side=side, reason="bad_tag", tell=tell)
    chain.append(
        s,
        node_id=ctx.node_id,
        at=ctx.clock.now(),
        event=Event.RELAY_MESSAGE_REFUSED,
        fields={"segment": segment_id, "pair": pair.pair_id, "reason": "bad_tag", "sender": sender},
    )
    return Outcome(segment_id, "discarded")


def apply_notice(ctx: NodeContext, sender: str, msg: messages.RelayNotice) -> Outcome:
    """A: check tagA, take the named link bytes as the segment, wait for B's check value."""
    segment_id = msg.segment_id
    with ctx.db.write() as s:
        pair, header = _header_for(s, ctx, sender, segment_id, msg.header, "notice")
        existing = s.get(PairSegment, segment_id)
        if existing is not None and existing.link_applied:
            return Outcome(segment_id, "already")
        key, mac_key = _spend(
            s,
            ctx,
            header.notice_link,
            pair,
            header.notice_key_ranges,
            header.notice_mac_ranges,
            header.length,
        )
        try:
            verify_one_time_mac(mac_key, arithmetic.mac_input(msg.header), msg.tag)
        except CryptoError:
            return _bad_tag(s, ctx, pair, segment_id, "notice", sender)
        row = _store(s, ctx, header=header, pair=pair, side="notice", key=key)
        return Outcome(segment_id, "discarded" if row.state == "discarded" else "applied")


def apply_ciphertext(ctx: NodeContext, sender: str, msg: messages.RelayCiphertext) -> Outcome:
    """B: take KB and M, check the tag, recover KA, send A a check value.

    A bad tag spends the named link bytes all the same (so the link stays in step with
    the relay), records the refusal and discards the segment on both sides.
    """
    segment_id = msg.segment_id
    with ctx.db.write() as s:
        pair, header = _header_for(s, ctx, sender, segment_id, msg.header, "cipher")
        existing = s.get(PairSegment, segment_id)
        if existing is not None and existing.link_applied:
            return Outcome(segment_id, "already")
        if len(msg.ciphertext) != header.length:
            raise InvalidInput("ciphertext: its length is not the header's bytes")
        key_b, mac_key = _spend(
            s,
            ctx,
            header.cipher_link,
            pair,
            header.cipher_key_ranges,
            header.cipher_mac_ranges,
            header.length,
        )
        try:
            verify_one_time_mac(mac_key, arithmetic.mac_input(msg.header, msg.ciphertext), msg.tag)
        except CryptoError:
            return _bad_tag(s, ctx, pair, segment_id, "cipher", sender)
        key_a = xor_bytes(msg.ciphertext, key_b)
        row = _store(s, ctx, header=header, pair=pair, side="cipher", key=key_a)
        if row.state == "discarded":
            return Outcome(segment_id, "discarded")
        check = arithmetic.check_value(key_a, identity_of(row, ctx.node_id), ctx.node_id)
        outbox.send(
            s,
            destination=row.partner,
            message=messages.SegmentCheck(segment_id=segment_id, pair_id=pair.pair_id, check=check),
            segment_id=segment_id,
            now=ctx.clock.now(),
        )
        return Outcome(segment_id, "applied")


def _key_of(ctx: NodeContext, row: PairSegment) -> bytes:
    assert row.sealed is not None
    return ctx.keyring.open(row.sealed, segment_context(row, row.used))


def _partners_row(row: PairSegment, sender: str, pair_id: str, side: str) -> None:
    """The sender must be this segment's partner station, about this segment's pair."""
    if sender != row.partner or row.side != side or pair_id != row.pair_id:
        raise Forbidden("only the partner station of this segment's pair may send this")


def apply_check(ctx: NodeContext, sender: str, msg: messages.SegmentCheck) -> Outcome:
    """A: compare B's check value; on a match the segment is ready here, and B and the
    relay are told. On a mismatch it is discarded on both sides."""
    segment_id = msg.segment_id
    with ctx.db.write() as s:
        row = s.get(PairSegment, segment_id, with_for_update=True)
        if row is None or not row.link_applied:
            raise OutOfOrder("not yet: the relay's notice for this segment has not arrived")
        _partners_row(row, sender, msg.pair_id, "notice")
        if row.state != "pending":
            return Outcome(segment_id, "already" if row.state == "ready" else "discarded")
        pair = _pair_for(s, ctx, row.pair_id)
        key = _key_of(ctx, row)
        identity = identity_of(row, ctx.node_id)
        if not constant_time_equal(msg.check, arithmetic.check_value(key, identity, sender)):
            _discard(
                s,
                ctx,
                pair=pair,
                segment_id=segment_id,
                side="notice",
                reason="check_mismatch",
                tell=[row.partner, pair.relay_id],
            )
            return Outcome(segment_id, "discarded")
        now = ctx.clock.now()
        row.state, row.settled_at = "ready", now
        confirmation = arithmetic.check_value(key, identity, ctx.node_id)
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
        return Outcome(segment_id, "applied")


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


def apply_confirmed(ctx: NodeContext, sender: str, msg: messages.SegmentConfirmed) -> Outcome:
    """B: A confirmed the segment; check A's value and turn the segment ready here."""
    segment_id = msg.segment_id
    with ctx.db.write() as s:
        row = s.get(PairSegment, segment_id, with_for_update=True)
        if row is None:
            raise NotFound(f"no segment {segment_id} here")
        _partners_row(row, sender, msg.pair_id, "cipher")
        if row.state != "pending":
            return Outcome(segment_id, "already" if row.state == "ready" else "discarded")
        pair = _pair_for(s, ctx, row.pair_id)
        key = _key_of(ctx, row)
        now = ctx.clock.now()
        identity = identity_of(row, ctx.node_id)
        if not constant_time_equal(msg.check, arithmetic.check_value(key, identity, sender)):
            _discard(
                s,
                ctx,
                pair=pair,
                segment_id=segment_id,
                side="cipher",
                reason="confirmation_mismatch",
                tell=[row.partner],
            )
            return Outcome(segment_id, "discarded")
        row.state, row.settled_at = "ready", now
        _record_ready(s, ctx, row, now)
        return Outcome(segment_id, "applied")


def apply_discarded(ctx: NodeContext, sender: str, msg: messages.SegmentDiscarded) -> Outcome:
    """Either station: the partner discarded the segment; do the same (idempotent).

    Only the partner of that segment, about that segment's pair: a neighbour in another
    pair cannot reach this pair's key. A discard of a segment not here yet leaves a
    tombstone bound to the pair and partner named; the relay's message of another pair
    under that ID does not honour it.
    """
    segment_id = msg.segment_id
    with ctx.db.write() as s:
        pair = _pair_for(s, ctx, msg.pair_id)
        if sender != _partner(pair, ctx.node_id):
            raise Forbidden("only the partner station discards a segment")
        row = s.get(PairSegment, segment_id, with_for_update=True)
        side: Side = "cipher" if msg.sender_side == "notice" else "notice"
        if row is not None:
            _partners_row(row, sender, msg.pair_id, row.side)
            if row.state == "discarded":
                return Outcome(segment_id, "already")
            if row.side != side:
                raise Forbidden("sender_side: the partner holds the other side of this segment")
        _discard(
            s,
            ctx,
            pair=pair,
            segment_id=segment_id,
            side=side,
            reason=msg.reason,
            tell=[pair.relay_id] if side == "notice" else [],
            notify_partner=False,
        )
        return Outcome(segment_id, "applied")


def _discard(
    s: Session,
    ctx: NodeContext,
    *,
    pair: Pair,
    segment_id: str,
    side: Side,
    reason: messages.Reason,
    tell: list[str],
    notify_partner: bool = True,
) -> None:
    """Destroy a segment's key (or leave a tombstone if it has not arrived yet) and tell
    the stations and relay in ``tell``."""
    now = ctx.clock.now()
    row = s.get(PairSegment, segment_id, with_for_update=True)
    if row is None:
        row = PairSegment(
            segment_id=segment_id,
            pair_id=pair.pair_id,
            side=side,
            partner=_partner(pair, ctx.node_id),
            owner="",
            length=0,
            used=0,
            epsilon=0.0,
            state="discarded",
            reason=reason,
            link_applied=False,
            made_at=now,
            received_at=now,
            settled_at=now,
            sealed=None,
        )
        s.add(row)
    else:
        row.state, row.reason, row.settled_at, row.sealed = "discarded", reason, now, None
        row.used = row.length
    for dest in tell:
        if dest == pair.relay_id:
            outbox.send(
                s,
                destination=dest,
                message=messages.SegmentSettled(
                    segment_id=segment_id, outcome="discarded", reason=reason
                ),
                segment_id=segment_id,
                now=now,
            )
        elif notify_partner:
            outbox.send(
                s,
                destination=dest,
                message=messages.SegmentDiscarded(
                    segment_id=segment_id, pair_id=pair.pair_id, reason=reason, sender_side=side
                ),
                segment_id=segment_id,
                now=now,
            )
    chain.append(
        s,
        node_id=ctx.node_id,
        at=now,
        event=Event.SEGMENT_DISCARDED,
        fields={"segment": segment_id, "pair": pair.pair_id, "side": side, "reason": reason},
    )


def expire_pending(ctx: NodeContext, older_than: datetime) -> int:
    """A: discard segments still pending since before ``older_than`` (B's check never
    came); B and the relay are told. Returns how many were discarded."""
    with ctx.db.write() as s:
        rows = (
            s.execute(
                select(PairSegment)
                .where(
                    PairSegment.state == "pending",
                    PairSegment.side == "notice",
                    PairSegment.received_at < older_than,
                )
                .with_for_update()
            )
            .scalars()
            .all()
        )
        for row in rows:
            pair = _pair_for(s, ctx, row.pair_id)
            _discard(
                s,
                ctx,
                pair=pair,
                segment_id=row.segment_id,
                side="notice",
                reason="confirmation_timeout",
                tell=[row.partner, pair.relay_id],
            )
        return len(rows)
