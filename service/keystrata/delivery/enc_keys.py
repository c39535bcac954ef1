"""Key delivery to SAEs (ETSI GS QKD 014): allocation at the master's station, delivery
at the slave's station, expiry.

* Get key (enc_keys) at station A, by master SAE a1 for slave b1 at station B: carve the
  keys from ready segments that A owns, destroy those bytes at A (the key is handed to
  a1 and A has no further use for it), record the allocation, and queue a
  ``key.allocated`` message to B in the same transaction.
* B applies the message (:mod:`keystrata.delivery.slave_copy`): it carves the same
  ranges from its copy of the segments and keeps each key sealed until every slave has
  fetched it or its time-to-live ends.
* Get key with key IDs (dec_keys) at B, by b1 naming master a1: only keys that A
  allocated to (a1 -> b1); each slave gets each key once; then the key is destroyed.
  When B does not know a key ID yet, it first pulls A's pending allocation messages;
  if A cannot be asked, or the message names key not ready at B yet, the answer is 503
  (try again), not a refusal: the key may well be allocated to this slave.

Every refusal on these routes is the same 401 answer (no oracle), recorded in the ledger.
"""

from __future__ import annotations

import json
import logging
import uuid
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from functools import partial
from typing import Any

from sqlalchemy import func, insert, select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.delivery.group_commit import GroupCommit
from keystrata.delivery.schemas import KeyRequest
from keystrata.delivery.slave_copy import apply_allocated_in, segments_of
from keystrata.delivery.stock import OwnedStock, key_bytes
from keystrata.errors import (
    AllocationNotHere,
    BadRequest,
    Forbidden,
    InvalidInput,
    NotEnoughKey,
    OutOfOrder,
    QuotaReached,
    SealBroken,
    Unauthenticated,
)
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.node import dispatch
from keystrata.peering import messages, outbox
from keystrata.ranges import Range
from keystrata.registry.principals import Caller
from keystrata.restore import comparison
from keystrata.storage.models import KeyAlloc, Pair, PairSegment, Principal
from keystrata.storage.sealed import key_context

log = logging.getLogger("keystrata.delivery")

#: Keys one Get key may ask for, and additional slaves one key may have.
MAX_KEY_PER_REQUEST = 1024
MAX_SAE_ID_COUNT = 8
#: Requests one group commit serves at most (see delivery/group_commit.py).
LANE_BATCH = 64
#: Key IDs per ``IN (...)`` (SQLite allows 32,766 parameters per statement).
_IN_CHUNK = 500

#: Returns the owner's pending allocation messages, or None when it cannot be asked now.
#: Recorded in place of an SAE ID that names no registered principal.
UNREGISTERED = "(unregistered)"

Pull = Callable[[str], list[dict[str, Any]] | None]


@dataclass(frozen=True)
class DeliveredKey:
    key_id: str
    key: bytes = field(repr=False)


@dataclass(frozen=True)
class Route:
    """The pair and SAEs of one request, once it is known to be allowed."""

    pair: Pair
    partner: str
    slaves: list[str]


def _refuse(ctx: NodeContext, caller: Caller, reason: str, **fields: Any) -> Unauthenticated:
    """Record a refusal and return the one 401 for every reason."""
    with ctx.db.write() as s:
        chain.append(s, node_id=ctx.node_id, **_refusal(s, ctx, caller, reason, fields))
    return Unauthenticated()


def _refusal(
    s: Session, ctx: NodeContext, caller: Caller, reason: str, fields: dict[str, Any]
) -> dict[str, Any]:
    """The ledger entry of a refusal. SAE IDs the caller named are recorded only when
    they are registered: anything else a client puts in an ID field (a key, by mistake
    or on purpose) stays out of the ledger."""
    for name in ("slave", "master"):
        if name in fields and s.get(Principal, fields[name]) is None:
            fields[name] = UNREGISTERED
    return {
        "at": ctx.clock.now(),
        "event": Event.KEY_REFUSED,
        "fields": {"sae": caller.principal_id, "reason": reason, **fields},
    }


def _sae(s: Session, sae_id: str) -> Principal | None:
    row = s.get(Principal, sae_id)
    if row is None or row.retired_at is not None or row.role != "sae":
        return None
    return row


def _pairs_between(s: Session, a: str, b: str) -> list[Pair]:
    first, second = sorted((a, b))
    return list(
        s.execute(
            select(Pair)
            .where(Pair.station_a == first, Pair.station_b == second, Pair.retired_at.is_(None))
            .order_by(Pair.pair_id)
        ).scalars()
    )


def allowed(pair: Pair, master: str, slaves: Sequence[str]) -> bool:
    """Whether the pair's registry entry lets ``master`` take key for ``slaves``."""
    return (pair.masters is None or master in pair.masters) and (
        pair.slaves is None or all(x in pair.slaves for x in slaves)
    )


def route_for_master(
    ctx: NodeContext, caller: Caller, slave_sae_id: str, additional: Sequence[str] = ()
) -> Route:
    """Check that ``caller`` (an SAE of this station) may get keys for the slave(s): an
    active pair joins this station and the slaves' station, and its registry entry lets
    the caller be master and the slaves be slaves (the first such pair by ID).

    Raises:
        Unauthenticated: any reason at all (recorded).
    """
    with ctx.db.read() as s:
        slave = _sae(s, slave_sae_id)
        ok = caller.role.value == "sae" and caller.station_id == ctx.node_id
        pairs = []
        if ok and slave is not None and slave.station_id not in (None, ctx.node_id):
            pairs = _pairs_between(s, ctx.node_id, str(slave.station_id))
        if not pairs or slave is None:
            raise _refuse(ctx, caller, "no_pair_for_these_saes", slave=slave_sae_id[:64])
        slaves = [slave_sae_id]
        for extra in additional:
            other = _sae(s, extra)
            if other is None or other.station_id != slave.station_id or extra in slaves:
                raise _refuse(ctx, caller, "additional_slave_not_allowed", slave=extra[:64])
            slaves.append(extra)
        pair = next((p for p in pairs if allowed(p, caller.principal_id, slaves)), None)
        if pair is None:
            raise _refuse(ctx, caller, "saes_not_allowed_in_pair", slave=slave_sae_id[:64])
        return Route(pair=pair, partner=str(slave.station_id), slaves=slaves)


def status(ctx: NodeContext, caller: Caller, slave_sae_id: str) -> dict[str, Any]:
    """The Status object for (caller -> slave): true counts and this node's limits."""
    route = route_for_master(ctx, caller, slave_sae_id)
    pair = route.pair
    with ctx.db.read() as s:
        ready = _owned_ready_bytes(s, pair.pair_id, ctx.node_id)
    return {
        "source_KME_ID": ctx.node_id,
        "target_KME_ID": route.partner,
        "master_SAE_ID": caller.principal_id,
        "slave_SAE_ID": slave_sae_id,
        "key_size": pair.default_key_size,
        "stored_key_count": 8 * ready // pair.default_key_size,
        "max_key_count": pair.buffer_max_bits // pair.default_key_size,
        "max_key_per_request": MAX_KEY_PER_REQUEST,
        "max_key_size": pair.max_key_size,
        "min_key_size": pair.min_key_size,
        "max_SAE_ID_count": MAX_SAE_ID_COUNT,
    }


def _owned_ready_bytes(s: Session, pair_id: str, owner: str) -> int:
    return int(
        s.execute(
            select(func.coalesce(func.sum(PairSegment.length - PairSegment.used), 0)).where(
                PairSegment.pair_id == pair_id,
                PairSegment.owner == owner,
                PairSegment.state == "ready",
            )
        ).scalar_one()
    )


def check_request(route: Route, request: KeyRequest) -> tuple[int, int]:
    """Return (number, size in bits) of a Key request. Raises BadRequest (400)."""
    pair = route.pair
    if request.extension_mandatory:
        # Not named back: a client may have put anything in those names.
        raise BadRequest(
            "extension_mandatory: this key manager supports no mandatory extension",
            details=[{"field": "extension_mandatory", "count": len(request.extension_mandatory)}],
        )
    number = 1 if request.number is None else request.number
    size = pair.default_key_size if request.size is None else request.size
    if size % 8:
        raise BadRequest("size must be a multiple of 8 bits")
    if not pair.min_key_size <= size <= pair.max_key_size:
        raise BadRequest(
            f"size must be between {pair.min_key_size} and {pair.max_key_size} "
            "bits (min_key_size..max_key_size)"
        )
    if number > MAX_KEY_PER_REQUEST:
        raise BadRequest(f"number must be at most {MAX_KEY_PER_REQUEST} (max_key_per_request)")
    if len(request.additional_slave_SAE_IDs or ()) > MAX_SAE_ID_COUNT:
        raise BadRequest(f"at most {MAX_SAE_ID_COUNT} additional_slave_SAE_IDs (max_SAE_ID_count)")
    return number, size


def get_keys(
    ctx: NodeContext, caller: Caller, slave_sae_id: str, request: KeyRequest
) -> list[DeliveredKey]:
    """Get key: allocate ``number`` keys of ``size`` bits for (caller -> slaves).

    The allocation runs in a group commit with the Get key requests that arrive at the
    same time (:mod:`keystrata.delivery.group_commit`); each still gets its own keys,
    ledger entry and answer.

    Raises:
        Unauthenticated: the caller may not ask this (401, recorded).
        BadRequest: malformed request values (400).
        QuotaReached / NotEnoughKey: 503 with a clear message.
    """
    comparison.refuse_if_held(ctx, caller, slave_sae_id)  # restore check: 503 while held
    if len(request.additional_slave_SAE_IDs or ()) > MAX_SAE_ID_COUNT:
        raise BadRequest(f"at most {MAX_SAE_ID_COUNT} additional_slave_SAE_IDs (max_SAE_ID_count)")
    route = route_for_master(ctx, caller, slave_sae_id, request.additional_slave_SAE_IDs or ())
    number, size = check_request(route, request)
    lane: GroupCommit[_Ask, list[DeliveredKey]] = _lane(ctx, "get_key", partial(_allocate, ctx))
    return lane.submit(_Ask(caller, route, number, size))


@dataclass(frozen=True)
class _Ask:
    caller: Caller
    route: Route
    number: int
    size: int

    @property
    def need(self) -> int:
        return self.number * self.size // 8


def _lane(ctx: NodeContext, name: str, run: Callable[[Any], Any]) -> Any:
    """This process's group commit ``name``, created on first use around ``run``."""
    lane = ctx.lanes.get(name)
    if lane is None:
        lane = ctx.lanes.setdefault(name, GroupCommit(run, max_batch=LANE_BATCH))
    return lane


def _allocate(ctx: NodeContext, asks: Sequence[_Ask]) -> list[list[DeliveredKey] | BaseException]:
    """Allocate the keys of several Get key requests in one transaction, in order."""
    results: list[list[DeliveredKey] | BaseException] = [NotEnoughKey()] * len(asks)
    now = ctx.clock.now()
    by_pair: dict[str, list[int]] = {}
    for i, ask in enumerate(asks):
        by_pair.setdefault(ask.route.pair.pair_id, []).append(i)
    with ctx.db.write() as s:
        entries: list[tuple[datetime, Event, Mapping[str, Any]]] = []
        for pair_id, members in by_pair.items():
            pair = asks[members[0]].route.pair
            stock = OwnedStock(s, ctx.keyring, pair_id, ctx.node_id)
            stock.reserve(sum(asks[i].need for i in members))
            used = _used_today(s, ctx, pair, now)
            used_by: dict[str, int] = {}
            planned: list[tuple[int, list[tuple[str, list[Range]]]]] = []
            for i in members:
                ask = asks[i]
                master = ask.caller.principal_id
                if (
                    pair.daily_quota_bits is not None
                    and used + 8 * ask.need > pair.daily_quota_bits
                ):
                    results[i] = QuotaReached(
                        f"the daily quota of pair {pair_id} ({pair.daily_quota_bits} bits) "
                        f"would be exceeded: {used} bits delivered today"
                    )
                    continue
                if pair.sae_daily_quota_bits is not None:
                    if master not in used_by:
                        used_by[master] = _used_today(s, ctx, pair, now, master=master)
                    if used_by[master] + 8 * ask.need > pair.sae_daily_quota_bits:
                        results[i] = QuotaReached(
                            f"this SAE's daily quota in pair {pair_id} "
                            f"({pair.sae_daily_quota_bits} bits) would be exceeded: "
                            f"{used_by[master]} bits delivered to it today"
                        )
                        continue
                    used_by[master] += 8 * ask.need
                if ask.need > stock.left:
                    results[i] = NotEnoughKey(
                        f"{8 * stock.left} of the {8 * ask.need} bits asked for are ready"
                    )
                    continue
                used += 8 * ask.need
                keys = [(str(uuid.uuid4()), stock.take(ask.size // 8)) for _ in range(ask.number)]
                planned.append((i, keys))
            if not planned:
                continue
            taken = stock.destroy_taken()
            records = []
            expires = now + timedelta(seconds=pair.key_ttl_seconds)
            for i, keys in planned:
                ask = asks[i]
                mine = [_record(ask, key_id, ranges, now, expires) for key_id, ranges in keys]
                s.execute(
                    insert(KeyAlloc),
                    [_owned_row(pair_id, ctx.node_id, r, now, expires) for r in mine],
                )
                records += mine
                results[i] = [
                    DeliveredKey(key_id, key_bytes(taken, ranges)) for key_id, ranges in keys
                ]
                entries.append(
                    (
                        now,
                        Event.KEY_ALLOCATED,
                        {
                            "pair": pair_id,
                            "master": ask.caller.principal_id,
                            "slaves": ask.route.slaves,
                            "size_bits": ask.size,
                            "key_ids": [key_id for key_id, _ in keys],
                            "segments": segments_of(mine),
                            "delivered_to": ask.caller.principal_id,
                        },
                    )
                )
            outbox.send(
                s,
                destination=asks[planned[0][0]].route.partner,
                message=messages.KeyAllocated(pair_id=pair_id, owner=ctx.node_id, keys=records),
                segment_id=None,
                now=now,
            )
        chain.append_many(s, node_id=ctx.node_id, entries=entries)
    return results


def _used_today(
    s: Session, ctx: NodeContext, pair: Pair, now: datetime, *, master: str | None = None
) -> int:
    """Bits this station allocated for ``pair`` (to ``master`` only, if given) since
    midnight UTC; 0 when no pair quota applies."""
    if master is None and pair.daily_quota_bits is None:
        return 0
    day = now.replace(hour=0, minute=0, second=0, microsecond=0)
    query = select(func.coalesce(func.sum(KeyAlloc.size_bits), 0)).where(
        KeyAlloc.pair_id == pair.pair_id,
        KeyAlloc.owner == ctx.node_id,
        KeyAlloc.allocated_at >= day,
    )
    if master is not None:
        query = query.where(KeyAlloc.master_sae == master)
    return int(s.execute(query).scalar_one())


def _record(
    ask: _Ask, key_id: str, ranges: list[Range], now: datetime, expires: datetime
) -> messages.AllocatedKey:
    """A key as the ``key.allocated`` message tells the slave's station about it."""
    return messages.AllocatedKey(
        key_ID=key_id,
        master=ask.caller.principal_id,
        slaves=ask.route.slaves,
        ranges=[
            messages.SegmentRange(segment=r.buffer_id, offset=r.offset, length=r.length)
            for r in ranges
        ],
        size_bits=ask.size,
        allocated_at=now,
        expires_at=expires,
    )


def _owned_row(
    pair_id: str, owner: str, record: messages.AllocatedKey, now: datetime, expires: datetime
) -> dict[str, Any]:
    """The owner's ``key_alloc`` row of a key handed to its master at once."""
    return {
        "key_id": record.key_ID,
        "pair_id": pair_id,
        "owner": owner,
        "master_sae": record.master,
        "slaves": json.dumps(record.slaves),
        "fetched_by": "[]",
        "ranges": json.dumps([r.model_dump() for r in record.ranges]),
        "size_bits": record.size_bits,
        "state": "delivered",
        "allocated_at": now,
        "expires_at": expires,
        "settled_at": now,
        "sealed": None,
    }


def get_keys_with_ids(
    ctx: NodeContext,
    caller: Caller,
    master_sae_id: str,
    key_ids: Sequence[str],
    pull: Pull | None = None,
) -> list[DeliveredKey]:
    """Get key with key IDs: serve keys allocated to (master -> caller), once each.

    Raises:
        BadRequest: the same key ID twice.
        Unauthenticated: anything not allocated to (master -> caller), already fetched,
            expired or unknown (401, recorded).
        AllocationNotHere: a key ID is unknown here while the master's station could not
            be asked, or named key this station cannot take yet (503, try again).
    """
    comparison.refuse_if_held(ctx, caller, master_sae_id)  # restore check: 503 while held
    ids = [str(uuid.UUID(k)) for k in key_ids]
    if len(set(ids)) != len(ids):
        raise BadRequest("the same key_ID is asked for more than once")
    if caller.role.value != "sae" or caller.station_id != ctx.node_id:
        raise _refuse(ctx, caller, "not_an_sae_of_this_station", master=master_sae_id[:64])
    with ctx.db.read() as s:
        known = _known(s, ids)
        master = _sae(s, master_sae_id)
    unsettled = False
    if len(known) < len(ids) and pull is not None and master is not None:
        owner = str(master.station_id)
        # One pull per owner at a time in this process; the requests that arrive while
        # it runs share the next one (a group, like the commits below).
        pulls: GroupCommit[tuple[frozenset[str], Pull], bool] = _lane(
            ctx, f"pull:{owner}", partial(_pull_for, ctx, owner)
        )
        unsettled = pulls.submit((frozenset(set(ids) - known), pull))
    lane: GroupCommit[_Fetch, list[DeliveredKey]] = _lane(
        ctx, "get_key_with_ids", partial(_serve, ctx)
    )
    return lane.submit(_Fetch(caller, master_sae_id, ids, unsettled))


def _known(s: Session, ids: list[str]) -> set[str]:
    """The key IDs of ``ids`` this station holds an allocation of."""
    out: set[str] = set()
    for start in range(0, len(ids), _IN_CHUNK):
        chunk = ids[start : start + _IN_CHUNK]
        out.update(s.execute(select(KeyAlloc.key_id).where(KeyAlloc.key_id.in_(chunk))).scalars())
    return out


def _pull_for(
    ctx: NodeContext, owner: str, asks: Sequence[tuple[frozenset[str], Pull]]
) -> list[bool]:
    """One pull for several requests' missing key IDs; for each, whether its answer is
    unsettled (see :func:`_pull_and_apply`)."""
    wanted = sorted(set().union(*(missing for missing, _ in asks)))
    with ctx.db.read() as s:
        missing = set(wanted) - _known(s, wanted)  # an earlier pull may have brought them
    unsettled = bool(missing) and _pull_and_apply(ctx, owner, missing, asks[0][1])
    if not unsettled:
        return [False] * len(asks)
    with ctx.db.read() as s:
        known = _known(s, wanted)
    return [not ids <= known for ids, _ in asks]


def _pull_and_apply(ctx: NodeContext, owner: str, missing: set[str], pull: Pull) -> bool:
    """Fetch the owner's pending allocation messages and apply them in order until the
    ``missing`` key IDs are here. Returns True when the answer is unsettled: the owner
    could not be asked, or a message names key not ready here yet."""
    # If the owner cannot be asked, or its message names segment bytes not ready
    # here yet, an unknown key ID may be allocated all the same: "try again" (503),
    # not a refusal the slave would take as final.
    bodies = pull(owner)
    if bodies is None:
        return True
    # All in one transaction (one commit however many messages), each message in a
    # savepoint of its own: one that cannot apply leaves the others applied.
    refused: list[tuple[messages.KeyAllocated, Forbidden]] = []
    with ctx.db.write() as s:
        for body in bodies:
            try:
                msg = messages.parse(body)
            except InvalidInput:
                continue  # a malformed message holds no key of this request; others may
            if not isinstance(msg, messages.KeyAllocated):
                continue
            try:
                with s.begin_nested():
                    apply_allocated_in(ctx, s, owner, msg)
            except OutOfOrder:
                return True
            except Forbidden as refusal:
                refused.append((msg, refusal))
                continue
            except InvalidInput:
                continue
            # Messages apply in order; later ones can wait for the owner's push.
            missing -= {k.key_ID for k in msg.keys}
            if not missing:
                break
    for refused_msg, error in refused:
        dispatch.record_refusal(ctx, owner, refused_msg, error)
    return False


@dataclass(frozen=True)
class _Fetch:
    caller: Caller
    master: str
    ids: list[str]
    unsettled: bool  # the owner could not say whether unknown IDs are allocated


def _serve(ctx: NodeContext, fetches: Sequence[_Fetch]) -> list[list[DeliveredKey] | BaseException]:
    """Serve several Get key with key IDs requests in one transaction, in order. Each is
    served whole or not at all; a later request sees what earlier ones fetched."""
    now = ctx.clock.now()
    results: list[list[DeliveredKey] | BaseException] = []
    wanted = sorted({k for f in fetches for k in f.ids})
    with ctx.db.write() as s:
        rows: dict[str, KeyAlloc] = {}
        for start in range(0, len(wanted), _IN_CHUNK):
            chunk = wanted[start : start + _IN_CHUNK]
            query = select(KeyAlloc).where(KeyAlloc.key_id.in_(chunk)).with_for_update()
            rows.update((r.key_id, r) for r in s.execute(query).scalars())
        entries: list[tuple[datetime, Event, Mapping[str, Any]]] = []
        for f in fetches:
            if f.unsettled and any(k not in rows for k in f.ids):
                results.append(AllocationNotHere())  # before any per-key check
                continue
            problem = next((p for k in f.ids if (p := _unservable(rows.get(k), f, now))), None)
            if problem is not None:
                refusal = _refusal(
                    s, ctx, f.caller, problem, {"master": f.master[:64], "key_ids": f.ids[:16]}
                )
                entries.append((refusal["at"], refusal["event"], refusal["fields"]))
                results.append(Unauthenticated())
                continue
            try:
                out = [_open(ctx, rows[key_id]) for key_id in f.ids]
            except SealBroken:
                # The row's authorisation fields or sealed value were changed outside
                # keystrata (database write access without the KEK): serve nothing.
                log.error("a waiting key's sealed value does not open in its row: tampered")
                refusal = _refusal(
                    s,
                    ctx,
                    f.caller,
                    "sealed_value_does_not_open",
                    {"master": f.master[:64], "key_ids": f.ids[:16]},
                )
                entries.append((refusal["at"], refusal["event"], refusal["fields"]))
                results.append(Unauthenticated())
                continue
            for key_id in f.ids:
                row = rows[key_id]
                fetched = [*json.loads(row.fetched_by), f.caller.principal_id]
                row.fetched_by = json.dumps(fetched)
                if set(fetched) >= set(json.loads(row.slaves)):
                    row.state, row.sealed, row.settled_at = "delivered", None, now
            results.append(out)
            entries.append(
                (
                    now,
                    Event.KEY_DELIVERED,
                    {
                        "sae": f.caller.principal_id,
                        "master": f.master,
                        "pair": rows[f.ids[0]].pair_id,
                        "bits": sum(rows[k].size_bits for k in f.ids),
                        "key_ids": f.ids,
                    },
                )
            )
        chain.append_many(s, node_id=ctx.node_id, entries=entries)
    return results


def _open(ctx: NodeContext, row: KeyAlloc) -> DeliveredKey:
    """The key of a waiting row. Raises SealBroken when it does not open in this row."""
    assert row.sealed is not None
    return DeliveredKey(row.key_id, ctx.keyring.open(row.sealed, key_context(row)))


def _unservable(row: KeyAlloc | None, f: _Fetch, now: datetime) -> str | None:
    """Why the key of ``row`` cannot go to this fetch (its ``key.refused`` reason), or None.
    The caller always gets the standard's one 401; the reason is for the auditor, who
    must tell a replay from a mistake. Allocation is checked before state, so an SAE
    the key was not allocated to learns nothing of it even from the ledger."""
    if row is None:
        return "unknown_key_id"
    if row.master_sae != f.master or f.caller.principal_id not in json.loads(row.slaves):
        return "not_allocated_to_this_sae"
    if f.caller.principal_id in json.loads(row.fetched_by):
        return "already_delivered"
    if row.state == "expired" or row.expires_at <= now:
        return "expired"
    if row.state != "waiting":
        return "already_delivered"  # every slave fetched it (row settled)
    return None
