"""Pair key segments at a station: applying the relay's messages, and discarding.

Roles per segment: the *notice* station (A) was told which of its link bytes form the
segment; the *cipher* station (B) got the ciphertext. Both spend the named link bytes
and hold the segment ``pending`` until the two stations confirm it to each other
(:mod:`keystrata.relay.confirmation`); A decides. Either side may discard; the other
follows. A segment is never ready on one side while discarded on the other, except when
a confirmed value fails at B, which means tampering and is recorded as such. State
changes follow :mod:`keystrata.relay.segment_states`.

Every handler is idempotent by segment ID: a resent message changes nothing.
"""

from __future__ import annotations

from typing import Literal

from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.crypto.hazmat import check_value, verify_one_time_mac, xor_bytes
from keystrata.errors import CryptoError, Forbidden, InvalidInput, NotFound
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.links import consume
from keystrata.peering import messages, outbox
from keystrata.peering.messages import MessageResult
from keystrata.ranges import Range, total
from keystrata.relay import arithmetic
from keystrata.relay.segment_states import SegmentEvent, SegmentState, next_state
from keystrata.storage.models import Pair, PairSegment, QkdLink
from keystrata.storage.sealed import segment_context

Side = Literal["notice", "cipher"]


def pair_of_station(s: Session, ctx: NodeContext, pair_id: str) -> Pair:
    """The active pair ``pair_id`` of this station. Raises NotFound."""
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


def partner_of(pair: Pair, station: str) -> str:
    """The pair's other station."""
    return pair.station_b if pair.station_a == station else pair.station_a


def _ranges(wire: list[messages.LinkRange]) -> list[Range]:
    return [Range(r.block, r.offset, r.length) for r in wire]


def identity_of(row: PairSegment, station: str) -> arithmetic.SegmentIdentity:
    """The segment's identity as ``station`` holds it (what check values cover)."""
    notice, cipher = (station, row.partner) if row.side == "notice" else (row.partner, station)
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
    named = header.notice_station if side == "notice" else header.cipher_station
    if header.segment != segment_id or named != ctx.node_id:
        raise InvalidInput("header: names another segment or station")
    pair = pair_of_station(s, ctx, header.pair)
    if sender != pair.relay_id or header.relay != sender:
        raise Forbidden("only the pair's relay sends relay messages")
    other = header.cipher_station if side == "notice" else header.notice_station
    if other != partner_of(pair, ctx.node_id):
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
    partner = partner_of(pair, ctx.node_id)
    other_pair = row is not None and (row.pair_id != pair.pair_id or row.partner != partner)
    if row is None or other_pair:
        # No record yet, or a tombstone some other station left under this ID for a
        # pair it is in: the relay's authenticated header decides.
        if row is None:
            row = PairSegment(segment_id=segment_id)
            s.add(row)
        row.pair_id, row.side, row.partner, row.owner = pair.pair_id, side, partner, header.owner
        row.length, row.used, row.epsilon = len(key), 0, header.epsilon
        row.state = next_state(None, SegmentEvent.RECEIVED)
        row.reason, row.link_applied = None, True
        row.made_at, row.received_at, row.settled_at = header.made_at, now, None
        # Sealed last: the context binds the fields just set (storage/sealed.py).
        row.sealed = ctx.keyring.seal(key, segment_context(row, 0))
    else:  # the partner's discard came first: the link bytes are spent, no key kept
        row.state = next_state(row.state, SegmentEvent.RECEIVED)
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
) -> MessageResult:
    """A relay message whose one-time MAC fails: the link bytes are spent all the same
    (the link stays in step with the relay), the segment is discarded on both sides."""
    tell = [partner_of(pair, ctx.node_id)] + ([pair.relay_id] if side == "notice" else [])
    discard(s, ctx, pair=pair, segment_id=segment_id, side=side, reason="bad_tag", tell=tell)
    chain.append(
        s,
        node_id=ctx.node_id,
        at=ctx.clock.now(),
        event=Event.RELAY_MESSAGE_REFUSED,
        fields={"segment": segment_id, "pair": pair.pair_id, "reason": "bad_tag", "sender": sender},
    )
    return MessageResult.handled(segment_id, "discarded")


def apply_notice(ctx: NodeContext, sender: str, msg: messages.RelayNotice) -> MessageResult:
    """A: check tagA, take the named link bytes as the segment, wait for B's check value."""
    with ctx.db.write() as s:
        return apply_notice_in(ctx, s, sender, msg)


def apply_notice_in(
    ctx: NodeContext, s: Session, sender: str, msg: messages.RelayNotice
) -> MessageResult:
    """:func:`apply_notice` in the caller's write transaction."""
    segment_id = msg.segment_id
    pair, header = _header_for(s, ctx, sender, segment_id, msg.header, "notice")
    existing = s.get(PairSegment, segment_id)
    if existing is not None and existing.link_applied:
        return MessageResult.handled(segment_id, "already")
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
    if row.state == SegmentState.DISCARDED:
        return MessageResult.handled(segment_id, "discarded")
    return MessageResult.handled(segment_id, "applied")


def apply_ciphertext(ctx: NodeContext, sender: str, msg: messages.RelayCiphertext) -> MessageResult:
    """B: take KB and M, check the tag, recover KA, send A a check value.

    A bad tag spends the named link bytes all the same (so the link stays in step with
    the relay), records the refusal and discards the segment on both sides.
    """
    with ctx.db.write() as s:
        return apply_ciphertext_in(ctx, s, sender, msg)


def apply_ciphertext_in(
    ctx: NodeContext, s: Session, sender: str, msg: messages.RelayCiphertext
) -> MessageResult:
    """:func:`apply_ciphertext` in the caller's write transaction."""
    segment_id = msg.segment_id
    pair, header = _header_for(s, ctx, sender, segment_id, msg.header, "cipher")
    existing = s.get(PairSegment, segment_id)
    if existing is not None and existing.link_applied:
        return MessageResult.handled(segment_id, "already")
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
    if row.state == SegmentState.DISCARDED:
        return MessageResult.handled(segment_id, "discarded")
    check = check_value(key_a, identity_of(row, ctx.node_id).canonical(), ctx.node_id)
    outbox.send(
        s,
        destination=row.partner,
        message=messages.SegmentCheck(segment_id=segment_id, pair_id=pair.pair_id, check=check),
        segment_id=segment_id,
        now=ctx.clock.now(),
    )
    return MessageResult.handled(segment_id, "applied")


def discard(
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
    the relay and, unless ``notify_partner`` is False, the partner station in ``tell``."""
    now = ctx.clock.now()
    row = s.get(PairSegment, segment_id, with_for_update=True)
    if row is None:
        row = PairSegment(
            segment_id=segment_id,
            pair_id=pair.pair_id,
            side=side,
            partner=partner_of(pair, ctx.node_id),
            owner="",
            length=0,
            used=0,
            epsilon=0.0,
            state=next_state(None, SegmentEvent.DISCARDED),
            reason=reason,
            link_applied=False,
            made_at=now,
            received_at=now,
            settled_at=now,
            sealed=None,
        )
        s.add(row)
    else:
        row.state = next_state(row.state, SegmentEvent.DISCARDED)
        row.reason, row.settled_at, row.sealed = reason, now, None
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
