"""The slave's station's side of key allocation (ETSI GS QKD 014 delivery between the
two stations of a pair).

* ``key.allocated`` from the owner (the master's station): carve the same segment
  ranges from this station's copy of the segments and keep each key sealed until every
  slave has fetched it or its time-to-live ends. Ranges must start at the segment's
  consumption point: ahead of it is "not yet" (an earlier message is on its way),
  behind it would reuse key (refused).
* Expiry: keys no slave fetched in time are destroyed here and the owner is told
  (``key.expired``), which records them as expired on its side.

Get key and Get key with key IDs themselves are in :mod:`keystrata.delivery.enc_keys`
and :mod:`keystrata.delivery.dec_keys`; the states of a key in
:mod:`keystrata.delivery.key_states`.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from datetime import datetime, timedelta

from sqlalchemy import select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.delivery.key_states import KeyState, at_slave_station, move
from keystrata.errors import Forbidden, InvalidInput, KeystrataError, OutOfOrder
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.peering import messages, outbox
from keystrata.peering.messages import MessageResult
from keystrata.ranges import Range
from keystrata.relay.segment_states import SegmentState
from keystrata.storage.front import Front, Refusals, segment_front, store_segment
from keystrata.storage.models import KeyAlloc, Pair, PairSegment, Principal
from keystrata.storage.sealed import key_context

#: How far another station's clock may be ahead of ours when it dates an allocation
#: (NTP-synchronised hosts are far closer; common practice).
CLOCK_SKEW = timedelta(seconds=300)


def apply_allocated(ctx: NodeContext, sender: str, msg: messages.KeyAllocated) -> MessageResult:
    """Slave's station: take the named segment bytes as keys waiting for their slaves."""
    with ctx.db.write() as s:
        return apply_allocated_in(ctx, s, sender, msg)


def apply_allocated_run(
    ctx: NodeContext, sender: str, msgs: Sequence[messages.KeyAllocated]
) -> tuple[list[MessageResult], KeystrataError | None]:
    """Apply consecutive ``key.allocated`` messages in order in one transaction (one
    commit), each in a savepoint as if it came alone; stop at the first that does not
    apply. Returns the outcomes of those applied and the error that stopped the run.

    A failure of the transaction itself (the database went away) raises: then none of
    them is applied.
    """
    outcomes: list[MessageResult] = []
    error: KeystrataError | None = None
    with ctx.db.write() as s:
        for msg in msgs:
            try:
                with s.begin_nested():
                    outcomes.append(apply_allocated_in(ctx, s, sender, msg))
            except KeystrataError as exc:
                error = exc
                break
    return outcomes, error


def _sae_at(s: Session, sae_id: str, station: str) -> bool:
    row = s.get(Principal, sae_id)
    return (
        row is not None
        and row.retired_at is None
        and row.role == "sae"
        and row.station_id == station
    )


def check_binding(
    s: Session, ctx: NodeContext, sender: str, msg: messages.KeyAllocated, now: datetime
) -> Pair:
    """What an allocation claims, against this station's registry: the sender is this
    station's partner in an active pair and the owner it names; each key's master is an
    active SAE of the sender allowed as master in the pair, its slaves active SAEs of this
    station allowed as slaves, its size within the pair's key sizes and its lifetime
    within the pair's time-to-live. Returns the pair.

    Raises:
        Forbidden: any of these fails (nothing is applied).
    """
    pair = s.get(Pair, msg.pair_id)
    if (
        pair is None
        or pair.retired_at is not None
        or ctx.node_id
        not in (
            pair.station_a,
            pair.station_b,
        )
    ):
        raise Forbidden("no active pair of this station by that ID")
    partner = pair.station_b if pair.station_a == ctx.node_id else pair.station_a
    if sender != partner or msg.owner != sender:
        raise Forbidden("only the pair's other station allocates its keys")
    ttl = timedelta(seconds=pair.key_ttl_seconds)
    masters_ok: dict[str, bool] = {}
    slaves_ok: dict[str, bool] = {}
    for rec in msg.keys:
        if rec.master not in masters_ok:
            masters_ok[rec.master] = _sae_at(s, rec.master, sender) and (
                pair.masters is None or rec.master in pair.masters
            )
        for slave in rec.slaves:
            if slave not in slaves_ok:
                slaves_ok[slave] = _sae_at(s, slave, ctx.node_id) and (
                    pair.slaves is None or slave in pair.slaves
                )
        if not masters_ok[rec.master]:
            raise Forbidden("a key's master is not an SAE of the sending station in this pair")
        if not all(slaves_ok[x] for x in rec.slaves):
            raise Forbidden("a key's slaves are not SAEs of this station in this pair")
        if not pair.min_key_size <= rec.size_bits <= pair.max_key_size:
            raise Forbidden("a key's size is outside the pair's key sizes")
        if rec.expires_at - rec.allocated_at > ttl or rec.allocated_at > now + CLOCK_SKEW:
            raise Forbidden("a key's lifetime is beyond the pair's time-to-live")
    return pair


def lock_named_segments(s: Session, msgs: Sequence[messages.PeerMessage]) -> None:
    """Lock every segment the ``key.allocated`` messages among ``msgs`` name, in one
    sorted statement, before any of them is applied.

    A transaction that applies several such messages (a run of pushed messages, a pull)
    and locked each message's segments in turn could lock them in another order than a
    transaction applying an overlapping set, and PostgreSQL would end one of them as a
    deadlock (seen in the load test: two runs each holding the segment the other needs).
    Taken all at once in segment order, the later transaction waits for the earlier.
    """
    named = sorted(
        {
            r.segment
            for msg in msgs
            if isinstance(msg, messages.KeyAllocated)
            for rec in msg.keys
            for r in rec.ranges
        }
    )
    if named:
        s.execute(
            select(PairSegment.segment_id)
            .where(PairSegment.segment_id.in_(named))
            .order_by(PairSegment.segment_id)
            .with_for_update()
        ).all()


def apply_allocated_in(
    ctx: NodeContext, s: Session, sender: str, msg: messages.KeyAllocated
) -> MessageResult:
    """:func:`apply_allocated` in the caller's transaction."""
    now = ctx.clock.now()
    pair = check_binding(s, ctx, sender, msg, now)
    pair_id = pair.pair_id
    # The same message can be applied twice at once (the owner's push and this
    # station's pull, or two workers). Lock the segments it names first, in one
    # order: the later transaction then waits, and sees the keys as already here.
    named = sorted({r.segment for rec in msg.keys for r in rec.ranges})
    s.execute(
        select(PairSegment.segment_id)
        .where(PairSegment.segment_id.in_(named))
        .order_by(PairSegment.segment_id)
        .with_for_update()
    ).all()
    applied: list[str] = []
    taken: list[messages.AllocatedKey] = []
    for rec in msg.keys:
        key_id = rec.key_ID
        if s.get(KeyAlloc, key_id) is not None:
            continue
        key = _take_named(ctx, s, pair_id, sender, rec.ranges)
        live = rec.expires_at > now
        row = KeyAlloc(
            key_id=key_id,
            pair_id=pair_id,
            owner=sender,
            master_sae=rec.master,
            slaves=json.dumps(rec.slaves),
            fetched_by="[]",
            ranges=json.dumps([r.model_dump() for r in rec.ranges]),
            size_bits=rec.size_bits,
            state=at_slave_station(live=live),
            allocated_at=rec.allocated_at,
            expires_at=rec.expires_at,
            settled_at=None if live else now,
            sealed=None,
        )
        # Bound to the key's pair, owner, master, slaves and size (storage/sealed.py).
        row.sealed = ctx.keyring.seal(key, key_context(row)) if live else None
        s.add(row)
        applied.append(key_id)
        taken.append(rec)
    if applied:
        chain.append(
            s,
            node_id=ctx.node_id,
            at=now,
            event=Event.KEY_ALLOCATED,
            fields={
                "pair": pair_id,
                "owner": sender,
                "masters": sorted({r.master for r in taken}),
                "slaves": sorted({x for r in taken for x in r.slaves}),
                "bits": sum(r.size_bits for r in taken),
                "key_ids": applied,
                "segments": segments_of(taken),
                "side": "slave",
            },
        )
    return MessageResult.handled(applied[0] if applied else "", "applied" if applied else "already")


def segments_of(records: Sequence[messages.AllocatedKey]) -> list[str]:
    """The segments (one per relay operation) that keys were cut from, in order."""
    return list(dict.fromkeys(r.segment for rec in records for r in rec.ranges))


#: Errors for a key range not at the front of its segment.
_REFUSALS = Refusals(
    ahead=lambda r, used: OutOfOrder("not yet: earlier keys of this segment have not arrived"),
    behind=lambda r, used: InvalidInput("a key range names segment bytes already used"),
    outside=lambda r, used: InvalidInput("a key range names segment bytes already used"),
)


def _take_named(
    ctx: NodeContext, s: Session, pair_id: str, owner: str, ranges: Sequence[messages.SegmentRange]
) -> bytes:
    """The key bytes of ``ranges``, taken from this station's copy of their segments."""
    parts: list[bytes] = []
    fronts: dict[str, tuple[PairSegment, Front]] = {}
    for r in ranges:
        row = s.get(PairSegment, r.segment, with_for_update=True)
        if row is not None and (row.pair_id != pair_id or row.owner != owner):
            raise Forbidden("a key range names a segment of another pair or owner")
        if row is None or row.state != SegmentState.READY:
            raise OutOfOrder("not yet: the segment of this key is not ready here")
        if r.segment not in fronts:
            fronts[r.segment] = (row, segment_front(ctx.keyring, row, _REFUSALS))
        parts.append(fronts[r.segment][1].take(Range(r.segment, r.offset, r.length)))
    for row, front in fronts.values():
        store_segment(row, front)
    return b"".join(parts)


def expire(ctx: NodeContext) -> int:
    """Slave's station: destroy keys whose time-to-live ended and tell the owner."""
    now = ctx.clock.now()
    with ctx.db.write() as s:
        rows = (
            s.execute(
                select(KeyAlloc)
                .where(KeyAlloc.state == KeyState.WAITING.value, KeyAlloc.expires_at <= now)
                .with_for_update()
            )
            .scalars()
            .all()
        )
        by_owner: dict[tuple[str, str], list[KeyAlloc]] = {}
        for row in rows:
            row.state = move(row.state, KeyState.EXPIRED)
            row.sealed, row.settled_at = None, now
            by_owner.setdefault((row.owner, row.pair_id), []).append(row)
        for (owner, pair_id), expired in by_owner.items():
            key_ids = [r.key_id for r in expired]
            for start in range(0, len(key_ids), messages.MAX_KEYS):
                outbox.send(
                    s,
                    destination=owner,
                    message=messages.KeyExpired(
                        pair_id=pair_id, key_ids=key_ids[start : start + messages.MAX_KEYS]
                    ),
                    segment_id=None,
                    now=now,
                )
            chain.append(
                s,
                node_id=ctx.node_id,
                at=now,
                event=Event.KEY_EXPIRED,
                fields={
                    "pair": pair_id,
                    "bits": sum(r.size_bits for r in expired),
                    "key_ids": key_ids,
                    "side": "slave",
                },
            )
        return len(rows)


def apply_expired(ctx: NodeContext, sender: str, msg: messages.KeyExpired) -> MessageResult:
    """Owner: record that keys it allocated expired uncollected at the slave's station.

    Only keys of the named pair that this station allocated, reported by its partner in
    that pair; any other key ID named refuses the whole message.
    """
    now = ctx.clock.now()
    with ctx.db.write() as s:
        pair = s.get(Pair, msg.pair_id)
        if pair is None or {sender, ctx.node_id} != {pair.station_a, pair.station_b}:
            raise Forbidden("only the pair's other station reports its keys expired")
        rows = (
            s.execute(
                select(KeyAlloc)
                .where(
                    KeyAlloc.key_id.in_(msg.key_ids),
                    KeyAlloc.owner == ctx.node_id,
                    KeyAlloc.pair_id == pair.pair_id,
                )
                .with_for_update()
            )
            .scalars()
            .all()
        )
        if len(rows) != len(set(msg.key_ids)):
            raise Forbidden("a key ID named is not a key this station allocated in the pair")
        newly = [r for r in rows if r.state != KeyState.EXPIRED]
        changed = [r.key_id for r in newly]
        bits = sum(r.size_bits for r in newly)
        for row in newly:
            row.state = move(row.state, KeyState.EXPIRED)
        for row in rows:
            row.settled_at = now
        if changed:
            chain.append(
                s,
                node_id=ctx.node_id,
                at=now,
                event=Event.KEY_EXPIRED,
                fields={"pair": pair.pair_id, "bits": bits, "key_ids": changed, "side": "master"},
            )
    return MessageResult.handled("", "applied" if changed else "already")
