"""Get key (ETSI GS QKD 014 enc_keys) at the master's station.

At station A, master SAE a1 asks keys for slave b1 at station B: A takes the keys from
the front of the ready segments it owns (:mod:`keystrata.delivery.stock`), destroys
those bytes (the key is handed to a1 and A has no further use for it), records the
allocation, and queues a ``key.allocated`` message to B in the same transaction. B
applies it (:mod:`keystrata.delivery.slave_copy`) and serves the keys to their slaves
(:mod:`keystrata.delivery.dec_keys`).

Every refusal is the same 401 answer (no oracle), recorded in the ledger
(:mod:`keystrata.delivery.routing`).
"""

from __future__ import annotations

import json
import uuid
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from functools import partial
from typing import Any, cast

from sqlalchemy import Table, func, insert, select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.delivery import group_commit
from keystrata.delivery.key_states import AT_OWNER
from keystrata.delivery.routing import Route, route_for_master
from keystrata.delivery.schemas import KeyRequest
from keystrata.delivery.slave_copy import segments_of
from keystrata.delivery.stock import OwnedStock, key_bytes
from keystrata.errors import BadRequest, NotEnoughKey, QuotaReached
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.peering import messages, outbox
from keystrata.ranges import Range
from keystrata.registry.principals import Caller
from keystrata.relay import buffers
from keystrata.restore import holds
from keystrata.storage.models import KeyAlloc, Pair

#: Keys one Get key may ask for, and additional slaves one key may have.
MAX_KEY_PER_REQUEST = 1024
MAX_SAE_ID_COUNT = 8
#: Requests one group commit serves at most (see delivery/group_commit.py).
GROUP_BATCH = 64
#: The owner's rows of the keys it hands out: a Core insert (no ORM bookkeeping for
#: rows this transaction never reads again).
_INSERT_OWNED = insert(cast(Table, KeyAlloc.__table__))


@dataclass(frozen=True)
class DeliveredKey:
    """A key as an SAE receives it."""

    key_id: str
    key: bytes = field(repr=False)


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
    holds.refuse_if_held(ctx, caller, slave_sae_id)  # restore check: 503 while held
    if len(request.additional_slave_SAE_IDs or ()) > MAX_SAE_ID_COUNT:
        raise BadRequest(f"at most {MAX_SAE_ID_COUNT} additional_slave_SAE_IDs (max_SAE_ID_count)")
    route = route_for_master(ctx, caller, slave_sae_id, request.additional_slave_SAE_IDs or ())
    number, size = check_request(route, request)
    allocating = group_commit.shared(
        ctx.process_state, "get_key", partial(_allocate, ctx), max_batch=GROUP_BATCH
    )
    return allocating.submit(_GetKeyRequest(caller, route, number, size))


@dataclass(frozen=True)
class _GetKeyRequest:
    """One Get key request, checked, as its group commit serves it."""

    caller: Caller
    route: Route
    number: int
    size: int

    @property
    def need(self) -> int:
        return self.number * self.size // 8


def _allocate(
    ctx: NodeContext, requests: Sequence[_GetKeyRequest]
) -> list[list[DeliveredKey] | BaseException]:
    """Allocate the keys of several Get key requests in one transaction, in order."""
    results: list[list[DeliveredKey] | BaseException] = [NotEnoughKey()] * len(requests)
    now = ctx.clock.now()
    by_pair: dict[str, list[int]] = {}
    for i, request in enumerate(requests):
        by_pair.setdefault(request.route.pair.pair_id, []).append(i)
    with ctx.db.write() as s:
        entries: list[tuple[datetime, Event, Mapping[str, Any]]] = []
        for pair_id, members in by_pair.items():
            pair = requests[members[0]].route.pair
            stock = OwnedStock(s, ctx.keyring, pair_id, ctx.node_id)
            unmet = buffers.unmet_demand(ctx)
            stock.reserve(sum(requests[i].need for i in members))
            used = _used_today(s, ctx, pair, now)
            used_by: dict[str, int] = {}
            planned: list[tuple[int, list[tuple[str, list[Range]]]]] = []
            for i in members:
                request = requests[i]
                master = request.caller.principal_id
                if (
                    pair.daily_quota_bits is not None
                    and used + 8 * request.need > pair.daily_quota_bits
                ):
                    results[i] = QuotaReached(
                        f"the daily quota of pair {pair_id} ({pair.daily_quota_bits} bits) "
                        f"would be exceeded: {used} bits delivered today"
                    )
                    continue
                if pair.sae_daily_quota_bits is not None:
                    if master not in used_by:
                        used_by[master] = _used_today(s, ctx, pair, now, master=master)
                    if used_by[master] + 8 * request.need > pair.sae_daily_quota_bits:
                        results[i] = QuotaReached(
                            f"this SAE's daily quota in pair {pair_id} "
                            f"({pair.sae_daily_quota_bits} bits) would be exceeded: "
                            f"{used_by[master]} bits delivered to it today"
                        )
                        continue
                    used_by[master] += 8 * request.need
                if request.need > stock.left:
                    results[i] = NotEnoughKey(
                        f"{8 * stock.left} of the {8 * request.need} bits asked for are ready"
                    )
                    unmet.note(pair_id, 8 * request.need, now)  # demand the relay must see
                    continue
                used += 8 * request.need
                keys = [
                    (str(uuid.uuid4()), stock.take(request.size // 8))
                    for _ in range(request.number)
                ]
                planned.append((i, keys))
            if not planned:
                continue
            taken = stock.destroy_taken()
            records = []
            expires = now + timedelta(seconds=pair.key_ttl_seconds)
            for i, keys in planned:
                request = requests[i]
                allocated = [
                    _record(request, key_id, ranges, now, expires) for key_id, ranges in keys
                ]
                s.execute(
                    _INSERT_OWNED,
                    [_owned_row(pair_id, ctx.node_id, r, now, expires) for r in allocated],
                )
                records += allocated
                results[i] = [
                    DeliveredKey(key_id, key_bytes(taken, ranges)) for key_id, ranges in keys
                ]
                entries.append(
                    (
                        now,
                        Event.KEY_ALLOCATED,
                        {
                            "pair": pair_id,
                            "master": request.caller.principal_id,
                            "slaves": request.route.slaves,
                            "size_bits": request.size,
                            "key_ids": [key_id for key_id, _ in keys],
                            "segments": segments_of(allocated),
                            "delivered_to": request.caller.principal_id,
                        },
                    )
                )
            outbox.send(
                s,
                destination=requests[planned[0][0]].route.partner,
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
    request: _GetKeyRequest, key_id: str, ranges: list[Range], now: datetime, expires: datetime
) -> messages.AllocatedKey:
    """A key as the ``key.allocated`` message tells the slave's station about it."""
    return messages.AllocatedKey(
        key_ID=key_id,
        master=request.caller.principal_id,
        slaves=request.route.slaves,
        ranges=[
            messages.SegmentRange(segment=r.buffer_id, offset=r.offset, length=r.length)
            for r in ranges
        ],
        size_bits=request.size,
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
        "state": AT_OWNER,
        "allocated_at": now,
        "expires_at": expires,
        "settled_at": now,
        "sealed": None,
    }
