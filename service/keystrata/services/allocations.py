"""The slave's station's side of key allocation (ETSI GS QKD 014 delivery between the
two stations of a pair).

* ``key.allocated`` from the owner (the master's station): carve the same segment
  ranges from this station's copy of the segments and keep each key sealed until every
  slave has fetched it or its time-to-live ends. Ranges must start at the segment's
  consumption point: ahead of it is "not yet" (an earlier message is on its way),
  behind it would reuse key (refused).
* Expiry: keys no slave fetched in time are destroyed here and the owner is told
  (``key.expired``), which records them as expired on its side.

Get key and Get key with key IDs themselves are in :mod:`keystrata.services.delivery`.
"""

from __future__ import annotations

import json
import uuid
from collections.abc import Sequence
from datetime import datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from keystrata.domain.ledger import Event
from keystrata.errors import Forbidden, InvalidInput, KeystrataError
from keystrata.services import ledger, outbox
from keystrata.services.context import NodeContext
from keystrata.services.linkbytes import NotYet
from keystrata.services.segments import Outcome
from keystrata.storage.models import KeyAlloc, Pair, PairSegment
from keystrata.storage.sealed import key_context, segment_context


def apply_allocated(ctx: NodeContext, sender: str, body: dict[str, Any]) -> Outcome:
    """Slave's station: take the named segment bytes as keys waiting for their slaves."""
    with ctx.db.write() as s:
        return apply_allocated_in(ctx, s, sender, body)


def apply_allocated_run(
    ctx: NodeContext, sender: str, bodies: Sequence[dict[str, Any]]
) -> tuple[list[Outcome], KeystrataError | None]:
    """Apply consecutive ``key.allocated`` messages in order in one transaction (one
    commit), each in a savepoint as if it came alone; stop at the first that does not
    apply. Returns the outcomes of those applied and the error that stopped the run.

    A failure of the transaction itself (the database went away) raises: then none of
    them is applied.
    """
    outcomes: list[Outcome] = []
    error: KeystrataError | None = None
    with ctx.db.write() as s:
        for body in bodies:
            try:
                with s.begin_nested():
                    outcomes.append(apply_allocated_in(ctx, s, sender, body))
            except KeystrataError as exc:
                error = exc
                break
            except (KeyError, TypeError, ValueError):
                error = InvalidInput("message key.allocated: missing or malformed field")
                break
    return outcomes, error


def apply_allocated_in(ctx: NodeContext, s: Session, sender: str, body: dict[str, Any]) -> Outcome:
    """:func:`apply_allocated` in the caller's transaction."""
    pair_id = str(body["pair_id"])
    pair = s.get(Pair, pair_id)
    if pair is None or ctx.node_id not in (pair.station_a, pair.station_b):
        raise InvalidInput(f"no pair {pair_id!r} at this station")
    partner = pair.station_b if pair.station_a == ctx.node_id else pair.station_a
    if sender != partner or body.get("owner") != sender:
        raise Forbidden("only the pair's other station allocates its keys")
    now = ctx.clock.now()
    # The same message can be applied twice at once (the owner's push and this
    # station's pull, or two workers). Lock the segments it names first, in one
    # order: the later transaction then waits, and sees the keys as already here.
    named = sorted({str(r["segment"]) for rec in body["keys"] for r in rec["ranges"]})
    s.execute(
        select(PairSegment.segment_id)
        .where(PairSegment.segment_id.in_(named))
        .order_by(PairSegment.segment_id)
        .with_for_update()
    ).all()
    applied, taken = [], []
    for rec in body["keys"]:
        key_id = str(uuid.UUID(str(rec["key_ID"])))
        if s.get(KeyAlloc, key_id) is not None:
            continue
        key = _carve_named(ctx, s, pair_id, sender, rec["ranges"])
        if len(key) * 8 != int(rec["size_bits"]):
            raise InvalidInput("size_bits does not match the ranges")
        expires = datetime.fromisoformat(str(rec["expires_at"]))
        live = expires > now
        s.add(
            KeyAlloc(
                key_id=key_id,
                pair_id=pair_id,
                owner=sender,
                master_sae=str(rec["master"]),
                slaves=json.dumps(rec["slaves"]),
                fetched_by="[]",
                ranges=json.dumps(rec["ranges"]),
                size_bits=int(rec["size_bits"]),
                state="waiting" if live else "expired",
                allocated_at=datetime.fromisoformat(str(rec["allocated_at"])),
                expires_at=expires,
                settled_at=None if live else now,
                sealed=ctx.keyring.seal(key, key_context(key_id)) if live else None,
            )
        )
        applied.append(key_id)
        taken.append(rec)
    if applied:
        ledger.append(
            s,
            node_id=ctx.node_id,
            at=now,
            event=Event.KEY_ALLOCATED,
            fields={
                "pair": pair_id,
                "owner": sender,
                "masters": sorted({str(r["master"]) for r in taken}),
                "slaves": sorted({str(x) for r in taken for x in r["slaves"]}),
                "bits": sum(int(r["size_bits"]) for r in taken),
                "key_ids": applied,
                "segments": segments_of(taken),
                "side": "slave",
            },
        )
    return Outcome(applied[0] if applied else "", "applied" if applied else "already")


def segments_of(records: Sequence[dict[str, Any]]) -> list[str]:
    """The segments (one per relay operation) that keys were cut from, in order."""
    return list(dict.fromkeys(str(r["segment"]) for rec in records for r in rec["ranges"]))


def _carve_named(
    ctx: NodeContext, s: Session, pair_id: str, owner: str, ranges: list[dict[str, Any]]
) -> bytes:
    out = b""
    for r in ranges:
        row = s.get(PairSegment, str(r["segment"]), with_for_update=True)
        if row is None or row.state != "ready":
            raise NotYet("not yet: the segment of this key is not ready here")
        if row.pair_id != pair_id or row.owner != owner:
            raise InvalidInput("a key range names a segment of another pair or owner")
        offset, length = int(r["offset"]), int(r["length"])
        if offset > row.used:
            raise NotYet("not yet: earlier keys of this segment have not arrived")
        if offset < row.used or length <= 0 or offset + length > row.length:
            raise InvalidInput("a key range names segment bytes already used")
        assert row.sealed is not None
        rest = ctx.keyring.open(row.sealed, segment_context(row.segment_id, row.used))
        out += rest[:length]
        _advance(ctx, row, length, rest[length:])
    return out


def _advance(ctx: NodeContext, row: PairSegment, taken: int, rest: bytes) -> None:
    row.used += taken
    row.sealed = ctx.keyring.seal(rest, segment_context(row.segment_id, row.used)) if rest else None


def expire(ctx: NodeContext) -> int:
    """Slave's station: destroy keys whose time-to-live ended and tell the owner."""
    now = ctx.clock.now()
    with ctx.db.write() as s:
        rows = (
            s.execute(
                select(KeyAlloc)
                .where(KeyAlloc.state == "waiting", KeyAlloc.expires_at <= now)
                .with_for_update()
            )
            .scalars()
            .all()
        )
        by_owner: dict[tuple[str, str], list[KeyAlloc]] = {}
        for row in rows:
            row.state, row.sealed, row.settled_at = "expired", None, now
            by_owner.setdefault((row.owner, row.pair_id), []).append(row)
        for (owner, pair_id), expired in by_owner.items():
            key_ids = [r.key_id for r in expired]
            outbox.enqueue(
                s,
                destination=owner,
                kind="key.expired",
                segment_id=None,
                now=now,
                body={"pair_id": pair_id, "key_ids": key_ids},
            )
            ledger.append(
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


def apply_expired(ctx: NodeContext, sender: str, body: dict[str, Any]) -> Outcome:
    """Owner: record that keys it allocated expired uncollected at the slave's station."""
    now = ctx.clock.now()
    with ctx.db.write() as s:
        rows = (
            s.execute(
                select(KeyAlloc)
                .where(
                    KeyAlloc.key_id.in_([str(k) for k in body["key_ids"]]),
                    KeyAlloc.owner == ctx.node_id,
                )
                .with_for_update()
            )
            .scalars()
            .all()
        )
        changed = [r.key_id for r in rows if r.state != "expired"]
        bits = sum(r.size_bits for r in rows if r.state != "expired")
        for row in rows:
            pair = s.get(Pair, row.pair_id)
            if pair is None or sender not in (pair.station_a, pair.station_b):
                raise Forbidden("only the pair's other station reports its keys expired")
            row.state, row.settled_at = "expired", now
        if changed:
            ledger.append(
                s,
                node_id=ctx.node_id,
                at=now,
                event=Event.KEY_EXPIRED,
                fields={
                    "pair": str(body["pair_id"]),
                    "bits": bits,
                    "key_ids": changed,
                    "side": "master",
                },
            )
    return Outcome("", "applied" if changed else "already")
