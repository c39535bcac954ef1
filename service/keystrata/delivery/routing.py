"""Which pair serves a request of an SAE, and the one refusal for every reason.

Every refusal on the key delivery routes is the same 401 answer (no oracle), recorded
in the ledger with its reason for the auditor.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.errors import Unauthenticated
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.registry import cache
from keystrata.registry.principals import Caller
from keystrata.storage.models import ID_LEN, Pair, Principal

#: Recorded in place of an SAE ID that names no registered principal.
UNREGISTERED = "(unregistered)"


@dataclass(frozen=True)
class Route:
    """The pair and SAEs of one request, once it is known to be allowed."""

    pair: Pair
    partner: str
    slaves: list[str]


def refuse(ctx: NodeContext, caller: Caller, reason: str, **fields: Any) -> Unauthenticated:
    """Record a refusal and return the one 401 for every reason."""
    with ctx.db.write() as s:
        chain.append(s, node_id=ctx.node_id, **refusal_entry(s, ctx, caller, reason, fields))
    return Unauthenticated()


def refusal_entry(
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


def active_sae(s: Session, sae_id: str) -> Principal | None:
    """The registry entry of ``sae_id`` if it names an active SAE."""
    row = s.get(Principal, sae_id)
    if row is None or row.retired_at is not None or row.role != "sae":
        return None
    return row


def _pairs_between(s: Session, a: str, b: str) -> tuple[Pair, ...]:
    first, second = sorted((a, b))
    rows = list(
        s.execute(
            select(Pair)
            .where(Pair.station_a == first, Pair.station_b == second, Pair.retired_at.is_(None))
            .order_by(Pair.pair_id)
        ).scalars()
    )
    for row in rows:
        s.expunge(row)  # kept by the registry snapshot: read only from here on
    return tuple(rows)


def _sae_station(ctx: NodeContext, snapshot: cache.Snapshot, sae_id: str) -> str | None:
    """The station of ``sae_id`` if it names an active SAE (else None), from the snapshot."""

    def load() -> str | None:
        with ctx.db.read() as s:
            row = active_sae(s, sae_id)
            return None if row is None else row.station_id

    return snapshot.get("sae.station", sae_id, load)


def sae_station(ctx: NodeContext, generation: int | None, sae_id: str) -> str | None:
    """The station of ``sae_id`` if it names an active SAE, from the registry snapshot of
    ``generation`` or later (a caller's :attr:`Caller.generation`)."""
    if len(sae_id) > ID_LEN:
        return None
    return _sae_station(ctx, cache.at_least(ctx, generation), sae_id)


def _pairs(ctx: NodeContext, snapshot: cache.Snapshot, a: str, b: str) -> tuple[Pair, ...]:
    def load() -> tuple[Pair, ...]:
        with ctx.db.read() as s:
            return _pairs_between(s, a, b)

    return snapshot.get("pairs.between", (a, b), load)


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
    snapshot = cache.at_least(ctx, caller.generation)
    if len(slave_sae_id) > ID_LEN:  # longer than any registered ID: not worth a lookup
        raise refuse(ctx, caller, "no_pair_for_these_saes", slave=slave_sae_id[:64])
    station = _sae_station(ctx, snapshot, slave_sae_id)
    ok = caller.role.value == "sae" and caller.station_id == ctx.node_id
    pairs: tuple[Pair, ...] = ()
    if ok and station not in (None, ctx.node_id):
        pairs = _pairs(ctx, snapshot, ctx.node_id, str(station))
    if not pairs or station is None:
        raise refuse(ctx, caller, "no_pair_for_these_saes", slave=slave_sae_id[:64])
    slaves = [slave_sae_id]
    for extra in additional:
        other = _sae_station(ctx, snapshot, extra) if len(extra) <= ID_LEN else None
        if other is None or other != station or extra in slaves:
            raise refuse(ctx, caller, "additional_slave_not_allowed", slave=extra[:64])
        slaves.append(extra)
    pair = next((p for p in pairs if allowed(p, caller.principal_id, slaves)), None)
    if pair is None:
        raise refuse(ctx, caller, "saes_not_allowed_in_pair", slave=slave_sae_id[:64])
    return Route(pair=pair, partner=str(station), slaves=slaves)
