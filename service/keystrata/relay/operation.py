"""The relay operation: turn link key shared with two stations into a segment of pair key
those stations share (see :mod:`keystrata.relay.arithmetic` for the method).

One transaction takes KA, KB and the one-time MAC key M, destroys them, records the
operation (no key bytes), and queues the notice to A and the ciphertext to B in the
outbox. The relay never stores pair key: the outbox holds only C = KA xor KB, which
without KB (destroyed here) says nothing about KA.
"""

from __future__ import annotations

import json
import uuid
from collections.abc import Iterable
from dataclasses import dataclass

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.crypto.hazmat import one_time_mac, xor_bytes
from keystrata.errors import EpsilonTooLarge, LinkKeyShort, NotFound
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.links import consume
from keystrata.peering import messages, outbox
from keystrata.ranges import Range, split_after, take_ranges
from keystrata.relay import arithmetic
from keystrata.relay.segment_states import RelayOpState, relay_settled
from keystrata.storage.models import Pair, QkdLink, RelayOp


@dataclass(frozen=True)
class SegmentMade:
    segment_id: str
    pair_id: str
    length: int
    owner: str
    epsilon: float


def link_of(session: Session, relay_id: str, station: str) -> str:
    """The active QKD link between this relay and ``station``. Raises NotFound."""
    link = session.execute(
        select(QkdLink.link_id)
        .where(
            QkdLink.relay_id == relay_id,
            QkdLink.station_id == station,
            QkdLink.retired_at.is_(None),
        )
        .order_by(QkdLink.link_id)
    ).scalar()
    if link is None:
        raise NotFound(f"no active QKD link from {relay_id} to {station}")
    return str(link)


def links_to(session: Session, relay_id: str, stations: Iterable[str]) -> dict[str, str]:
    """The active QKD link of this relay to each of ``stations`` that has one."""
    links: dict[str, str] = {}
    for station in stations:
        try:
            links[station] = link_of(session, relay_id, station)
        except NotFound:
            continue
    return links


def segments_in_flight(session: Session) -> dict[str, int]:
    """Segments made and not yet settled, per pair (pairs without any are left out)."""
    rows = session.execute(
        select(RelayOp.pair_id, func.count())
        .where(RelayOp.state == RelayOpState.SENT)
        .group_by(RelayOp.pair_id)
    ).all()
    return {str(pair_id): int(count) for pair_id, count in rows}


def make_segment(
    ctx: NodeContext,
    pair_id: str,
    n: int,
    *,
    owner: str | None = None,
    cipher_station: str | None = None,
    actor: str = "operator",
) -> SegmentMade:
    """Run one relay operation of ``n`` bytes for a pair, in one transaction.

    ``actor`` names who asked (the scheduler records its worker identity) in the ledger.

    ``cipher_station`` (B) receives the ciphertext; by default the station whose link
    holds more key. Each link gives ``n`` bytes of key and 32 bytes of one-time MAC key.
    ``owner`` defaults to A (the notice station).

    Raises:
        NotFound: no such active pair at this relay, or a link is missing.
        LinkKeyShort: a link holds too little key.
        EpsilonTooLarge: the segment would exceed the pair's maximum epsilon.
    """
    segment_id = str(uuid.uuid4())
    with ctx.db.write() as s:
        pair = s.get(Pair, pair_id)
        if pair is None or pair.retired_at is not None or pair.relay_id != ctx.node_id:
            raise NotFound(f"no active pair {pair_id!r} through this relay")
        stations = (pair.station_a, pair.station_b)
        links = {st: link_of(s, ctx.node_id, st) for st in stations}
        need = n + arithmetic.MAC_KEY_BYTES
        avail = {st: consume.available(s, links[st], need) for st in stations}
        if cipher_station is None:
            # The ciphertext goes to the side with more key on its link (common practice
            # for spreading wear; both sides pay n + 32 bytes).
            free = {st: sum(b.length - b.used for b in avail[st]) for st in stations}
            cipher_station = max(stations, key=lambda st: (free[st], st))
        notice_station = stations[1] if cipher_station == stations[0] else stations[0]
        try:
            ranges_a, ranges_ma = split_after(take_ranges(avail[notice_station], need), n)
            ranges_b, ranges_m = split_after(take_ranges(avail[cipher_station], need), n)
        except ValueError as exc:
            raise LinkKeyShort(str(exc)) from exc
        key_am, eps_a = consume.take(s, ctx.keyring, links[notice_station], ranges_a + ranges_ma)
        key_bm, eps_b = consume.take(s, ctx.keyring, links[cipher_station], ranges_b + ranges_m)
        epsilon = arithmetic.compose_epsilon(eps_a + eps_b)
        if pair.max_epsilon is not None and epsilon > pair.max_epsilon:
            raise EpsilonTooLarge(
                f"segment epsilon {epsilon:.3g} exceeds the pair's maximum {pair.max_epsilon:.3g}"
            )
        owner = owner or notice_station
        if owner not in stations:
            raise NotFound(f"{owner!r} is not a station of pair {pair_id}")
        now = ctx.clock.now()
        header = messages.SegmentHeader(
            v=messages.HEADER_VERSION,
            segment=segment_id,
            pair=pair_id,
            relay=ctx.node_id,
            notice_station=notice_station,
            cipher_station=cipher_station,
            owner=owner,
            length=n,
            epsilon=epsilon,
            made_at=now,
            notice_link=links[notice_station],
            notice_key_ranges=_wire(ranges_a),
            notice_mac_ranges=_wire(ranges_ma),
            cipher_link=links[cipher_station],
            cipher_key_ranges=_wire(ranges_b),
            cipher_mac_ranges=_wire(ranges_m),
        ).encode()
        ciphertext = xor_bytes(key_am[:n], key_bm[:n])
        tag_a = one_time_mac(key_am[n:], arithmetic.mac_input(header))
        tag = one_time_mac(key_bm[n:], arithmetic.mac_input(header, ciphertext))
        del key_am, key_bm  # nothing of KA, KB, MA or M outlives this transaction
        used = {
            links[notice_station]: [w.model_dump() for w in _wire(ranges_a + ranges_ma)],
            links[cipher_station]: [w.model_dump() for w in _wire(ranges_b + ranges_m)],
        }
        s.add(
            RelayOp(
                segment_id=segment_id,
                pair_id=pair_id,
                notice_station=notice_station,
                cipher_station=cipher_station,
                owner=owner,
                length=n,
                epsilon=epsilon,
                ranges=json.dumps(used),
                state=RelayOpState.SENT,
                made_at=now,
                settled_at=None,
            )
        )
        outbox.send(
            s,
            destination=notice_station,
            message=messages.RelayNotice(segment_id=segment_id, header=header, tag=tag_a),
            segment_id=segment_id,
            now=now,
        )
        outbox.send(
            s,
            destination=cipher_station,
            message=messages.RelayCiphertext(
                segment_id=segment_id, header=header, ciphertext=ciphertext, tag=tag
            ),
            segment_id=segment_id,
            now=now,
        )
        chain.append(
            s,
            node_id=ctx.node_id,
            at=now,
            event=Event.RELAY_SEGMENT_MADE,
            fields={
                "segment": segment_id,
                "pair": pair_id,
                "bytes": n,
                "owner": owner,
                "notice_station": notice_station,
                "cipher_station": cipher_station,
                "epsilon": epsilon,
                "link_bytes": used,
                "actor": actor,
            },
        )
    return SegmentMade(segment_id, pair_id, n, owner, epsilon)


def _wire(ranges: list[Range]) -> list[messages.LinkRange]:
    return [messages.LinkRange(block=r.buffer_id, offset=r.offset, length=r.length) for r in ranges]


def settle(ctx: NodeContext, segment_id: str, outcome: str, reason: str | None) -> bool:
    """Record at the relay how a segment ended (reported by its notice station).

    Returns True when this call changed the record (False: already settled).
    """
    with ctx.db.write() as s:
        op = s.get(RelayOp, segment_id, with_for_update=True)
        if op is None:
            raise NotFound(f"no relay operation {segment_id}")
        settled = relay_settled(op.state, outcome)
        if settled is None:
            return False
        now = ctx.clock.now()
        op.state = settled
        op.settled_at = now
        chain.append(
            s,
            node_id=ctx.node_id,
            at=now,
            event=Event.RELAY_SEGMENT_SETTLED,
            fields={
                "segment": segment_id,
                "pair": op.pair_id,
                "outcome": outcome,
                "reason": reason,
            },
        )
    return True


def notice_station_of(ctx: NodeContext, segment_id: str) -> str:
    """The station that decides a segment's fate. Raises NotFound."""
    with ctx.db.read() as s:
        op = s.get(RelayOp, segment_id)
        if op is None:
            raise NotFound(f"no relay operation {segment_id}")
        return op.notice_station
