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
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.crypto.hazmat import one_time_mac, xor_bytes
from keystrata.errors import EpsilonTooLarge, Forbidden, KeystrataError, LinkKeyShort, NotFound
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.links import consume
from keystrata.peering import messages, outbox
from keystrata.ranges import Available, Range, split_after
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


@dataclass(frozen=True)
class Planned:
    """A segment the scheduler wants: ``n`` bytes, owned by ``owner`` (None: A)."""

    n: int
    owner: str | None = None


#: Bytes of segments one transaction makes at most (the first always goes, however
#: large): their link bytes, ciphertexts and message bodies are in memory until it
#: commits, so this bounds the relay's memory while it spares a commit, a ledger head
#: update and two block reads per segment.
BATCH_BYTES = 1 << 20


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
    made, error = make_segments(
        ctx, pair_id, [Planned(n, owner)], cipher_station=cipher_station, actor=actor
    )
    if error is not None:
        raise error
    return made[0]


class _Cursor:
    """The unused bytes of a link's blocks as read, handed out from the front."""

    def __init__(self, avail: list[Available]) -> None:
        blocks = [b for b in avail if b.used < b.length]
        self._ids = [b.buffer_id for b in blocks]
        self._used = [b.used for b in blocks]
        self._length = [b.length for b in blocks]
        self._epsilon = {b.buffer_id: b.epsilon for b in blocks}
        self.free = sum(b.length - b.used for b in blocks)
        self._head = 0

    def take(self, need: int) -> list[Range]:
        """Ranges of the next ``need`` bytes (the caller checked ``need <= free``)."""
        assert need <= self.free
        out: list[Range] = []
        left = need
        while left:
            i = self._head
            step = min(self._length[i] - self._used[i], left)
            out.append(Range(self._ids[i], self._used[i], step))
            self._used[i] += step
            left -= step
            if self._used[i] == self._length[i]:
                self._head += 1
        self.free -= need
        return out

    def epsilons(self, ranges: list[Range]) -> list[float]:
        """The epsilon of each block the ranges touch, once per block."""
        return [self._epsilon[b] for b in dict.fromkeys(r.buffer_id for r in ranges)]


def make_segments(
    ctx: NodeContext,
    pair_id: str,
    plan: Sequence[Planned],
    *,
    cipher_station: str | None = None,
    actor: str = "operator",
) -> tuple[list[SegmentMade], KeystrataError | None]:
    """Run the relay operations of ``plan`` for a pair, in order, in one transaction:
    each segment exactly as :func:`make_segment` makes it (its own header, MACs, record,
    messages and ledger entry), with one read and one update of each link's blocks and
    one ledger append for all of them.

    Stops at the first segment that cannot be made (link key short, epsilon above the
    pair's maximum, an owner not in the pair): the segments before it are made and
    returned with that error; nothing of it or of the rest is taken.

    Raises:
        NotFound: no such active pair at this relay, or a link is missing.
    """
    made: list[SegmentMade] = []
    error: KeystrataError | None = None
    with ctx.db.write() as s:
        pair = s.get(Pair, pair_id)
        if pair is None or pair.retired_at is not None or pair.relay_id != ctx.node_id:
            raise NotFound(f"no active pair {pair_id!r} through this relay")
        stations = (pair.station_a, pair.station_b)
        links = {st: link_of(s, ctx.node_id, st) for st in stations}
        need = sum(p.n + arithmetic.MAC_KEY_BYTES for p in plan)
        cursors = {st: _Cursor(consume.available(s, links[st], need)) for st in stations}
        if cipher_station is None:
            # The ciphertext goes to the side with more key on its link (common practice
            # for spreading wear; both sides pay n + 32 bytes).
            cipher_station = max(stations, key=lambda st: (cursors[st].free, st))
        notice_station = stations[1] if cipher_station == stations[0] else stations[0]
        a, b = cursors[notice_station], cursors[cipher_station]
        chosen: list[tuple[str, Planned, _Ranges, float]] = []
        for p in plan:
            owner = p.owner or notice_station
            if owner not in stations:
                error = NotFound(f"{owner!r} is not a station of pair {pair_id}")
                break
            if p.n + arithmetic.MAC_KEY_BYTES > min(a.free, b.free):
                short = a if a.free < b.free else b
                error = LinkKeyShort(
                    f"link holds {short.free} of the {p.n + arithmetic.MAC_KEY_BYTES} "
                    "bytes asked for"
                )
                break
            size = p.n + arithmetic.MAC_KEY_BYTES
            ranges = (*split_after(a.take(size), p.n), *split_after(b.take(size), p.n))
            epsilon = arithmetic.compose_epsilon(
                a.epsilons(ranges[0] + ranges[1]) + b.epsilons(ranges[2] + ranges[3])
            )
            if pair.max_epsilon is not None and epsilon > pair.max_epsilon:
                error = EpsilonTooLarge(
                    f"segment epsilon {epsilon:.3g} exceeds the pair's maximum "
                    f"{pair.max_epsilon:.3g}"
                )
                break
            chosen.append((owner, p, ranges, epsilon))
        if not chosen:
            return [], error
        link_a, link_b = links[notice_station], links[cipher_station]
        # One read and one update of each link's blocks for every segment of the batch:
        # the ranges follow one another on each link, segment after segment.
        key_a, _ = consume.take(
            s, ctx.keyring, link_a, [r for c in chosen for r in c[2][0] + c[2][1]]
        )
        key_b, _ = consume.take(
            s, ctx.keyring, link_b, [r for c in chosen for r in c[2][2] + c[2][3]]
        )
        now = ctx.clock.now()
        entries = []
        at = 0
        for owner, p, (ranges_a, ranges_ma, ranges_b, ranges_m), epsilon in chosen:
            size = p.n + arithmetic.MAC_KEY_BYTES
            segment_id = str(uuid.uuid4())
            fields = _one_segment(
                s,
                ctx,
                pair_id=pair_id,
                segment_id=segment_id,
                stations=(notice_station, cipher_station),
                owner=owner,
                epsilon=epsilon,
                now=now,
                links=(link_a, link_b),
                ranges=(ranges_a, ranges_ma, ranges_b, ranges_m),
                keys=(key_a[at : at + size], key_b[at : at + size]),
            )
            at += size
            entries.append((now, Event.RELAY_SEGMENT_MADE, {**fields, "actor": actor}))
            made.append(SegmentMade(segment_id, pair_id, p.n, owner, epsilon))
        del key_a, key_b  # nothing of KA, KB, MA or M outlives this transaction
        chain.append_many(s, node_id=ctx.node_id, entries=entries)
    return made, error


_Ranges = tuple[list[Range], list[Range], list[Range], list[Range]]


def _one_segment(
    s: Session,
    ctx: NodeContext,
    *,
    pair_id: str,
    segment_id: str,
    stations: tuple[str, str],
    owner: str,
    epsilon: float,
    now: datetime,
    links: tuple[str, str],
    ranges: _Ranges,
    keys: tuple[bytes, bytes],
) -> dict[str, Any]:
    """Header, ciphertext, MACs, record and messages of one segment whose link bytes
    (KA || MA, KB || M) were taken; returns its ledger entry's fields."""
    notice_station, cipher_station = stations
    ranges_a, ranges_ma, ranges_b, ranges_m = ranges
    key_am, key_bm = keys
    n = len(key_am) - arithmetic.MAC_KEY_BYTES
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
        notice_link=links[0],
        notice_key_ranges=_wire(ranges_a),
        notice_mac_ranges=_wire(ranges_ma),
        cipher_link=links[1],
        cipher_key_ranges=_wire(ranges_b),
        cipher_mac_ranges=_wire(ranges_m),
    ).encode()
    ciphertext = xor_bytes(key_am[:n], key_bm[:n])
    tag_a = one_time_mac(key_am[n:], arithmetic.mac_input(header))
    tag = one_time_mac(key_bm[n:], arithmetic.mac_input(header, ciphertext))
    del key_am, key_bm
    used = {links[0]: _plain(ranges_a + ranges_ma), links[1]: _plain(ranges_b + ranges_m)}
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
    return {
        "segment": segment_id,
        "pair": pair_id,
        "bytes": n,
        "owner": owner,
        "notice_station": notice_station,
        "cipher_station": cipher_station,
        "epsilon": epsilon,
        "link_bytes": used,
    }


def _plain(ranges: list[Range]) -> list[dict[str, Any]]:
    """Ranges as the JSON of :class:`messages.LinkRange` (what ``model_dump`` gives)."""
    return [{"block": r.buffer_id, "offset": r.offset, "length": r.length} for r in ranges]


def _wire(ranges: list[Range]) -> list[messages.LinkRange]:
    return [messages.LinkRange(block=r.buffer_id, offset=r.offset, length=r.length) for r in ranges]


def settle(ctx: NodeContext, segment_id: str, outcome: str, reason: str | None) -> bool:
    """Record at the relay how a segment ended (reported by its notice station).

    Returns True when this call changed the record (False: already settled).
    """
    with ctx.db.write() as s:
        return settle_in(ctx, s, segment_id, outcome, reason)


def settle_in(
    ctx: NodeContext,
    s: Session,
    segment_id: str,
    outcome: str,
    reason: str | None,
    *,
    sender: str | None = None,
) -> bool:
    """:func:`settle` in the caller's write transaction; with ``sender``, only when it
    is the segment's notice station (else Forbidden, nothing changed)."""
    op = s.get(RelayOp, segment_id, with_for_update=True)
    if op is None:
        raise NotFound(f"no relay operation {segment_id}")
    if sender is not None and op.notice_station != sender:
        raise Forbidden("only the segment's notice station settles it")
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
