"""Get key with key IDs (ETSI GS QKD 014 dec_keys) at the slave's station.

Station B serves b1, naming master a1, only keys that A allocated to (a1 -> b1); each
slave gets each key once; once every slave has it, the key is destroyed. When B does
not know a key ID yet, it first pulls A's pending allocation messages through the
:class:`~keystrata.delivery.ports.AllocationSource` port and applies them
(:mod:`keystrata.delivery.slave_copy`). If A cannot be asked, or a message names key
not ready at B yet, the answer is 503 (try again), not a refusal: the key may well be
allocated to this slave.
"""

from __future__ import annotations

import json
import logging
import uuid
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from functools import partial
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.delivery import group_commit
from keystrata.delivery.enc_keys import GROUP_BATCH, DeliveredKey
from keystrata.delivery.key_states import KeyState, after_fetch, move
from keystrata.delivery.ports import AllocationSource
from keystrata.delivery.routing import refusal_entry, refuse, sae_station
from keystrata.delivery.slave_copy import apply_allocated_in, lock_named_segments
from keystrata.errors import (
    AllocationNotHere,
    BadRequest,
    Forbidden,
    InvalidInput,
    OutOfOrder,
    SealBroken,
    Unauthenticated,
)
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.peering import messages
from keystrata.peering.refusals import record_refusal
from keystrata.registry.principals import Caller
from keystrata.restore import holds
from keystrata.storage.models import KeyAlloc
from keystrata.storage.sealed import key_context

log = logging.getLogger("keystrata.delivery")

#: Key IDs per ``IN (...)`` (SQLite allows 32,766 parameters per statement).
_IN_CHUNK = 500


@dataclass(frozen=True)
class _KeyIdsRequest:
    """One Get key with key IDs request, as its group commit serves it."""

    caller: Caller
    master: str
    ids: list[str]
    unsettled: bool  # the owner could not say whether unknown IDs are allocated
    may_pull: bool  # unknown IDs may be pulled from the owner before any refusal


@dataclass(frozen=True)
class _Unknown:
    """The answer of a first serving to a request naming IDs not here: pull them."""

    ids: frozenset[str]


@dataclass(frozen=True)
class _MissingIds:
    """Key IDs one request needs from the owner, and where to ask for them."""

    ids: frozenset[str]
    source: AllocationSource


def get_keys_with_ids(
    ctx: NodeContext,
    caller: Caller,
    master_sae_id: str,
    key_ids: Sequence[str],
    allocation_source: AllocationSource | None = None,
) -> list[DeliveredKey]:
    """Get key with key IDs: serve keys allocated to (master -> caller), once each.

    ``allocation_source`` is asked for the owner's pending allocations when a key ID is
    unknown here (None: it cannot be asked).

    Raises:
        BadRequest: the same key ID twice.
        Unauthenticated: anything not allocated to (master -> caller), already fetched,
            expired or unknown (401, recorded).
        AllocationNotHere: a key ID is unknown here while the master's station could not
            be asked, or named key this station cannot take yet (503, try again).
    """
    holds.refuse_if_held(ctx, caller, master_sae_id)  # restore check: 503 while held
    ids = [str(uuid.UUID(k)) for k in key_ids]
    if len(set(ids)) != len(ids):
        raise BadRequest("the same key_ID is asked for more than once")
    if caller.role.value != "sae" or caller.station_id != ctx.node_id:
        raise refuse(ctx, caller, "not_an_sae_of_this_station", master=master_sae_id[:64])
    serving: group_commit.GroupCommit[_KeyIdsRequest, list[DeliveredKey] | _Unknown]
    serving = group_commit.shared(
        ctx.process_state, "get_key_with_ids", partial(_serve, ctx), max_batch=GROUP_BATCH
    )
    owner = None
    if allocation_source is not None:
        owner = sae_station(ctx, caller.generation, master_sae_id)
    # Served at once when every key ID is here (the owner's message came first, as it
    # mostly does); else the unknown IDs are pulled from the owner and the request is
    # served again, as unsettled if the pull could not settle them.
    first = serving.submit(_KeyIdsRequest(caller, master_sae_id, ids, False, owner is not None))
    if not isinstance(first, _Unknown):
        return first
    assert owner is not None and allocation_source is not None
    # One pull per owner at a time in this process; the requests that arrive while
    # it runs share the next one (a group, like the commits).
    pulls = group_commit.shared(
        ctx.process_state,
        f"pull:{owner}",
        partial(_pull_group, ctx, owner),
        max_batch=GROUP_BATCH,
    )
    unsettled = pulls.submit(_MissingIds(first.ids, allocation_source))
    again = serving.submit(_KeyIdsRequest(caller, master_sae_id, ids, unsettled, False))
    assert not isinstance(again, _Unknown)
    return again


def _known(s: Session, ids: list[str]) -> set[str]:
    """The key IDs of ``ids`` this station holds an allocation of."""
    out: set[str] = set()
    for start in range(0, len(ids), _IN_CHUNK):
        chunk = ids[start : start + _IN_CHUNK]
        out.update(s.execute(select(KeyAlloc.key_id).where(KeyAlloc.key_id.in_(chunk))).scalars())
    return out


def _pull_group(ctx: NodeContext, owner: str, requests: Sequence[_MissingIds]) -> list[bool]:
    """One pull for several requests' missing key IDs; for each, whether its answer is
    unsettled (see :func:`_pull_and_apply`)."""
    wanted = sorted(set().union(*(r.ids for r in requests)))
    with ctx.db.read() as s:
        missing = set(wanted) - _known(s, wanted)  # an earlier pull may have brought them
    unsettled = bool(missing) and _pull_and_apply(ctx, owner, missing, requests[0].source)
    if not unsettled:
        return [False] * len(requests)
    with ctx.db.read() as s:
        known = _known(s, wanted)
    return [not r.ids <= known for r in requests]


def _pull_and_apply(
    ctx: NodeContext, owner: str, missing: set[str], source: AllocationSource
) -> bool:
    """Fetch the owner's pending allocation messages and apply them in order until the
    ``missing`` key IDs are here. Returns True when the answer is unsettled: the owner
    could not be asked, or a message names key not ready here yet."""
    # If the owner cannot be asked, or its message names segment bytes not ready
    # here yet, an unknown key ID may be allocated all the same: "try again" (503),
    # not a refusal the slave would take as final.
    bodies = source.pending_allocations(owner)
    if bodies is None:
        return True
    # All in one transaction (one commit however many messages), each message in a
    # savepoint of its own: one that cannot apply leaves the others applied.
    refused: list[tuple[messages.KeyAllocated, Forbidden]] = []
    # The ledger entries are written last (chain.deferred), so this transaction takes
    # the ledger head after the rows of every message, as the owner's push does.
    parsed: list[messages.KeyAllocated] = []
    for body in bodies:
        try:
            msg = messages.parse(body)
        except InvalidInput:
            continue  # a malformed message holds no key of this request; others may
        if isinstance(msg, messages.KeyAllocated):
            parsed.append(msg)
    # Messages apply in order; the ones after the last missing key can wait for the
    # owner's push, and their segments are not locked here.
    needed = set(missing)
    for end, msg in enumerate(parsed, start=1):
        needed -= {k.key_ID for k in msg.keys}
        if not needed:
            del parsed[end:]
            break
    with ctx.db.write() as s, chain.deferred(s, node_id=ctx.node_id) as entries:
        lock_named_segments(s, parsed)
        for msg in parsed:
            mark = entries.mark()
            try:
                with s.begin_nested():
                    apply_allocated_in(ctx, s, owner, msg)
            except OutOfOrder:
                entries.back_to(mark)
                return True
            except Forbidden as refusal:
                entries.back_to(mark)
                refused.append((msg, refusal))
                continue
            except InvalidInput:
                entries.back_to(mark)
                continue
            # Messages apply in order; later ones can wait for the owner's push.
            missing -= {k.key_ID for k in msg.keys}
            if not missing:
                break
    for refused_msg, error in refused:
        record_refusal(ctx, owner, refused_msg, error)
    return False


def _serve(
    ctx: NodeContext, requests: Sequence[_KeyIdsRequest]
) -> list[list[DeliveredKey] | _Unknown | BaseException]:
    """Serve several Get key with key IDs requests in one transaction, in order. Each is
    served whole or not at all; a later request sees what earlier ones fetched."""
    now = ctx.clock.now()
    results: list[list[DeliveredKey] | _Unknown | BaseException] = []
    wanted = sorted({k for request in requests for k in request.ids})
    with ctx.db.write() as s:
        rows: dict[str, KeyAlloc] = {}
        for start in range(0, len(wanted), _IN_CHUNK):
            chunk = wanted[start : start + _IN_CHUNK]
            query = select(KeyAlloc).where(KeyAlloc.key_id.in_(chunk)).with_for_update()
            rows.update((r.key_id, r) for r in s.execute(query).scalars())
        entries: list[tuple[datetime, Event, Mapping[str, Any]]] = []
        for request in requests:
            unknown = frozenset(k for k in request.ids if k not in rows)
            if unknown and request.may_pull:
                results.append(_Unknown(unknown))  # nothing recorded: asked again after the pull
                continue
            if request.unsettled and unknown:
                results.append(AllocationNotHere())  # before any per-key check
                continue
            problem = next(
                (p for k in request.ids if (p := _unservable(rows.get(k), request, now))), None
            )
            if problem is None:
                try:
                    out = [_open(ctx, rows[key_id]) for key_id in request.ids]
                except SealBroken:
                    # The row's authorisation fields or sealed value were changed outside
                    # keystrata (database write access without the KEK): serve nothing.
                    log.error("a waiting key's sealed value does not open in its row: tampered")
                    problem = "sealed_value_does_not_open"
            if problem is not None:
                refusal = refusal_entry(
                    s,
                    ctx,
                    request.caller,
                    problem,
                    {"master": request.master[:64], "key_ids": request.ids[:16]},
                )
                entries.append((refusal["at"], refusal["event"], refusal["fields"]))
                results.append(Unauthenticated())
                continue
            for key_id in request.ids:
                _record_fetch(rows[key_id], request.caller.principal_id, now)
            results.append(out)
            entries.append(
                (
                    now,
                    Event.KEY_DELIVERED,
                    {
                        "sae": request.caller.principal_id,
                        "master": request.master,
                        "pair": rows[request.ids[0]].pair_id,
                        "bits": sum(rows[k].size_bits for k in request.ids),
                        "key_ids": request.ids,
                    },
                )
            )
        chain.append_many(s, node_id=ctx.node_id, entries=entries)
    return results


def _record_fetch(row: KeyAlloc, slave: str, now: datetime) -> None:
    """Note that ``slave`` fetched the key of ``row``; destroy it once every slave has."""
    fetched = [*json.loads(row.fetched_by), slave]
    row.fetched_by = json.dumps(fetched)
    if after_fetch(json.loads(row.slaves), fetched) is KeyState.DELIVERED:
        row.state, row.sealed, row.settled_at = move(row.state, KeyState.DELIVERED), None, now


def _open(ctx: NodeContext, row: KeyAlloc) -> DeliveredKey:
    """The key of a waiting row. Raises SealBroken when it does not open in this row."""
    assert row.sealed is not None
    return DeliveredKey(row.key_id, ctx.keyring.open(row.sealed, key_context(row)))


def _unservable(row: KeyAlloc | None, request: _KeyIdsRequest, now: datetime) -> str | None:
    """Why the key of ``row`` cannot go to this request (its ``key.refused`` reason), or
    None. The caller always gets the standard's one 401; the reason is for the auditor,
    who must tell a replay from a mistake. Allocation is checked before state, so an SAE
    the key was not allocated to learns nothing of it even from the ledger."""
    if row is None:
        return "unknown_key_id"
    slave = request.caller.principal_id
    if row.master_sae != request.master or slave not in json.loads(row.slaves):
        return "not_allocated_to_this_sae"
    if slave in json.loads(row.fetched_by):
        return "already_delivered"
    if row.state == KeyState.EXPIRED or row.expires_at <= now:
        return "expired"
    if row.state != KeyState.WAITING:
        return "already_delivered"  # every slave fetched it (row settled)
    return None
