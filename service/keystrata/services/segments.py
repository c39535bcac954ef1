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

import base64
import binascii
import json
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from keystrata.crypto.hazmat import constant_time_equal, verify_one_time_mac, xor_bytes
from keystrata.domain import relay as method
from keystrata.domain.ledger import Event
from keystrata.domain.relay import Range
from keystrata.errors import CryptoError, Forbidden, InvalidInput, NotFound
from keystrata.services import ledger, linkbytes, outbox
from keystrata.services.context import NodeContext
from keystrata.services.linkbytes import NotYet
from keystrata.storage.models import Pair, PairSegment, QkdLink
from keystrata.storage.sealed import segment_context


@dataclass(frozen=True)
class Outcome:
    segment_id: str
    status: str  # applied | already | discarded


def _b64(value: Any, field: str) -> bytes:
    try:
        return base64.b64decode(str(value), validate=True)
    except (binascii.Error, ValueError):
        raise InvalidInput(f"{field}: not valid Base64") from None


def _pair_for(s: Session, ctx: NodeContext, pair_id: str) -> Pair:
    pair = s.get(Pair, pair_id)
    if (
        pair is None
        or pair.retired_at is not None
        or ctx.node_id not in (pair.station_a, pair.station_b)
    ):
        raise NotFound(f"no active pair {pair_id!r} with this station")
    return pair


def _own_link(s: Session, ctx: NodeContext, link_id: str, relay_id: str) -> None:
    link = s.get(QkdLink, link_id)
    if (
        link is None
        or link.retired_at is not None
        or link.station_id != ctx.node_id
        or link.relay_id != relay_id
    ):
        raise InvalidInput(f"link {link_id!r} is not this station's link to {relay_id}")


def _partner(pair: Pair, me: str) -> str:
    return pair.station_b if pair.station_a == me else pair.station_a


def _ranges(raw: Any, field: str) -> list[Range]:
    try:
        ranges = [Range.from_json(r) for r in raw]
    except (TypeError, KeyError, ValueError):
        raise InvalidInput(f"{field}: a list of {{block, offset, length}}") from None
    if not ranges or any(r.length <= 0 or r.offset < 0 for r in ranges):
        raise InvalidInput(f"{field}: ranges must be non-empty with positive lengths")
    return ranges


def _store(
    s: Session,
    ctx: NodeContext,
    *,
    segment_id: str,
    pair: Pair,
    side: str,
    owner: str,
    key: bytes,
    epsilon: float,
    made_at: datetime,
) -> PairSegment:
    now = ctx.clock.now()
    row = s.get(PairSegment, segment_id, with_for_update=True)
    sealed = ctx.keyring.seal(key, segment_context(segment_id, 0))
    if row is None:
        row = PairSegment(
            segment_id=segment_id,
            pair_id=pair.pair_id,
            side=side,
            partner=_partner(pair, ctx.node_id),
            owner=owner,
            length=len(key),
            used=0,
            epsilon=epsilon,
            state="pending",
            reason=None,
            link_applied=True,
            made_at=made_at,
            received_at=now,
            settled_at=None,
            sealed=sealed,
        )
        s.add(row)
    else:  # a discard reached us first: the link bytes are spent, the key is not kept
        row.link_applied, row.length, row.used, row.owner = True, len(key), len(key), owner
        row.epsilon = epsilon
    ledger.append(
        s,
        node_id=ctx.node_id,
        at=now,
        event=Event.SEGMENT_RECEIVED,
        fields={
            "segment": segment_id,
            "pair": pair.pair_id,
            "side": side,
            "bytes": len(key),
            "owner": owner,
            "state": row.state,
        },
    )
    return row


def apply_notice(ctx: NodeContext, sender: str, body: dict[str, Any]) -> Outcome:
    """A: take the named link bytes as the segment and wait for B's check value."""
    segment_id = str(body["segment_id"])
    with ctx.db.write() as s:
        pair = _pair_for(s, ctx, str(body["pair_id"]))
        if sender != pair.relay_id:
            raise Forbidden("only the pair's relay sends relay notices")
        existing = s.get(PairSegment, segment_id)
        if existing is not None and existing.link_applied:
            return Outcome(segment_id, "already")
        link_id = str(body["link_id"])
        _own_link(s, ctx, link_id, pair.relay_id)
        if body.get("partner") != _partner(pair, ctx.node_id):
            raise InvalidInput("partner: must be the other station of the pair")
        key, _ = linkbytes.take(s, ctx.keyring, link_id, _ranges(body["ranges"], "ranges"))
        if len(key) != int(body["bytes"]):
            raise InvalidInput("bytes: does not match the ranges")
        row = _store(
            s,
            ctx,
            segment_id=segment_id,
            pair=pair,
            side="notice",
            owner=str(body["owner"]),
            key=key,
            epsilon=float(body["epsilon"]),
            made_at=datetime.fromisoformat(str(body["made_at"])),
        )
        return Outcome(segment_id, "discarded" if row.state == "discarded" else "applied")


def apply_ciphertext(ctx: NodeContext, sender: str, body: dict[str, Any]) -> Outcome:
    """B: take KB and M, check the tag, recover KA, send A a check value.

    A bad tag spends the named link bytes all the same (so the link stays in step with
    the relay), records the refusal and discards the segment on both sides.
    """
    segment_id = str(body["segment_id"])
    header_bytes = _b64(body["header"], "header")
    ciphertext = _b64(body["ciphertext"], "ciphertext")
    tag = _b64(body["tag"], "tag")
    try:
        header = json.loads(header_bytes)
    except ValueError:
        raise InvalidInput("header: not JSON") from None
    if header.get("segment") != segment_id or header.get("cipher_station") != ctx.node_id:
        raise InvalidInput("header: names another segment or station")
    with ctx.db.write() as s:
        pair = _pair_for(s, ctx, str(header["pair"]))
        if sender != pair.relay_id or header.get("relay") != sender:
            raise Forbidden("only the pair's relay sends ciphertexts")
        existing = s.get(PairSegment, segment_id)
        if existing is not None and existing.link_applied:
            return Outcome(segment_id, "already")
        link_id = str(header["link"])
        _own_link(s, ctx, link_id, pair.relay_id)
        key_ranges = _ranges(header["key_ranges"], "header.key_ranges")
        mac_ranges = _ranges(header["mac_ranges"], "header.mac_ranges")
        n = int(header["bytes"])
        if method.total(key_ranges) != n or len(ciphertext) != n:
            raise InvalidInput("header: sizes of ranges and ciphertext disagree")
        if method.total(mac_ranges) != method.MAC_KEY_BYTES:
            raise InvalidInput("header.mac_ranges: must cover 32 bytes")
        if header.get("notice_station") != _partner(pair, ctx.node_id):
            raise InvalidInput("header.notice_station: must be the other station of the pair")
        key_bm, _ = linkbytes.take(s, ctx.keyring, link_id, key_ranges + mac_ranges)
        key_b, mac_key = key_bm[:n], key_bm[n:]
        try:
            verify_one_time_mac(mac_key, method.mac_input(header_bytes, ciphertext), tag)
        except CryptoError:
            _discard(
                s,
                ctx,
                pair=pair,
                segment_id=segment_id,
                side="cipher",
                reason="bad_tag",
                tell=[_partner(pair, ctx.node_id)],
            )
            ledger.append(
                s,
                node_id=ctx.node_id,
                at=ctx.clock.now(),
                event=Event.RELAY_MESSAGE_REFUSED,
                fields={
                    "segment": segment_id,
                    "pair": pair.pair_id,
                    "reason": "bad_tag",
                    "sender": sender,
                },
            )
            return Outcome(segment_id, "discarded")
        key_a = xor_bytes(ciphertext, key_b)
        row = _store(
            s,
            ctx,
            segment_id=segment_id,
            pair=pair,
            side="cipher",
            owner=str(header["owner"]),
            key=key_a,
            epsilon=float(header["epsilon"]),
            made_at=datetime.fromisoformat(str(header["made_at"])),
        )
        if row.state == "discarded":
            return Outcome(segment_id, "discarded")
        check = method.check_value(key_a, segment_id, ctx.node_id)
        outbox.enqueue(
            s,
            destination=row.partner,
            kind="segment.check",
            segment_id=segment_id,
            now=ctx.clock.now(),
            body={
                "segment_id": segment_id,
                "pair_id": pair.pair_id,
                "check": base64.b64encode(check).decode(),
            },
        )
        return Outcome(segment_id, "applied")


def _key_of(ctx: NodeContext, row: PairSegment) -> bytes:
    assert row.sealed is not None
    return ctx.keyring.open(row.sealed, segment_context(row.segment_id, row.used))


def apply_check(ctx: NodeContext, sender: str, body: dict[str, Any]) -> Outcome:
    """A: compare B's check value; on a match the segment is ready here, and B and the
    relay are told. On a mismatch it is discarded on both sides."""
    segment_id = str(body["segment_id"])
    check = _b64(body["check"], "check")
    with ctx.db.write() as s:
        row = s.get(PairSegment, segment_id, with_for_update=True)
        if row is None or not row.link_applied:
            raise NotYet("not yet: the relay's notice for this segment has not arrived")
        if sender != row.partner or row.side != "notice":
            raise Forbidden("only the partner station sends this segment's check value")
        if row.state != "pending":
            return Outcome(segment_id, "already" if row.state == "ready" else "discarded")
        pair = _pair_for(s, ctx, row.pair_id)
        key = _key_of(ctx, row)
        if not constant_time_equal(check, method.check_value(key, segment_id, sender)):
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
        mine = method.check_value(key, segment_id, ctx.node_id)
        outbox.enqueue(
            s,
            destination=row.partner,
            kind="segment.confirmed",
            segment_id=segment_id,
            now=now,
            body={
                "segment_id": segment_id,
                "pair_id": row.pair_id,
                "check": base64.b64encode(mine).decode(),
            },
        )
        outbox.enqueue(
            s,
            destination=pair.relay_id,
            kind="segment.settled",
            segment_id=segment_id,
            now=now,
            body={"segment_id": segment_id, "outcome": "ready"},
        )
        ledger.append(
            s,
            node_id=ctx.node_id,
            at=now,
            event=Event.SEGMENT_READY,
            fields={
                "segment": segment_id,
                "pair": row.pair_id,
                "bytes": row.length,
                "owner": row.owner,
            },
        )
        return Outcome(segment_id, "applied")


def apply_confirmed(ctx: NodeContext, sender: str, body: dict[str, Any]) -> Outcome:
    """B: A confirmed the segment; check A's value and turn the segment ready here."""
    segment_id = str(body["segment_id"])
    check = _b64(body["check"], "check")
    with ctx.db.write() as s:
        row = s.get(PairSegment, segment_id, with_for_update=True)
        if row is None:
            raise NotFound(f"no segment {segment_id} here")
        if sender != row.partner or row.side != "cipher":
            raise Forbidden("only the partner station confirms this segment")
        if row.state != "pending":
            return Outcome(segment_id, "already" if row.state == "ready" else "discarded")
        pair = _pair_for(s, ctx, row.pair_id)
        key = _key_of(ctx, row)
        now = ctx.clock.now()
        if not constant_time_equal(check, method.check_value(key, segment_id, sender)):
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
        ledger.append(
            s,
            node_id=ctx.node_id,
            at=now,
            event=Event.SEGMENT_READY,
            fields={
                "segment": segment_id,
                "pair": row.pair_id,
                "bytes": row.length,
                "owner": row.owner,
            },
        )
        return Outcome(segment_id, "applied")


def apply_discarded(ctx: NodeContext, sender: str, body: dict[str, Any]) -> Outcome:
    """Either station: the partner discarded the segment; do the same (idempotent)."""
    segment_id = str(body["segment_id"])
    with ctx.db.write() as s:
        pair = _pair_for(s, ctx, str(body["pair_id"]))
        if sender != _partner(pair, ctx.node_id):
            raise Forbidden("only the partner station discards a segment")
        row = s.get(PairSegment, segment_id, with_for_update=True)
        if row is not None and row.state == "discarded":
            return Outcome(segment_id, "already")
        side = "cipher" if body.get("sender_side") == "notice" else "notice"
        tell = [pair.relay_id] if side == "notice" else []
        _discard(
            s,
            ctx,
            pair=pair,
            segment_id=segment_id,
            side=side,
            reason=str(body.get("reason", "partner_discarded"))[:64],
            tell=tell,
            notify_partner=False,
        )
        return Outcome(segment_id, "applied")


def _discard(
    s: Session,
    ctx: NodeContext,
    *,
    pair: Pair,
    segment_id: str,
    side: str,
    reason: str,
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
            outbox.enqueue(
                s,
                destination=dest,
                kind="segment.settled",
                segment_id=segment_id,
                now=now,
                body={"segment_id": segment_id, "outcome": "discarded", "reason": reason},
            )
        elif notify_partner:
            outbox.enqueue(
                s,
                destination=dest,
                kind="segment.discarded",
                segment_id=segment_id,
                now=now,
                body={
                    "segment_id": segment_id,
                    "pair_id": pair.pair_id,
                    "reason": reason,
                    "sender_side": side,
                },
            )
    ledger.append(
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
