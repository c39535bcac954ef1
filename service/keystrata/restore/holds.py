"""Pair holds of the restore check at a station, and the refusal on the hot path.

A pair is held when a comparison (:mod:`keystrata.restore.comparison`) found this station
behind its partner: Get key and Get key with key IDs answer 503 for it
(:class:`~keystrata.errors.PairHeld`), and so does the buffer report to the relay, until
an operator releases it (:mod:`keystrata.restore.release`). Until this process has
compared a pair with its partner since it started, the pair serves nothing either
(:class:`~keystrata.errors.NotYetCompared`).
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy import select

from keystrata.context import NodeContext
from keystrata.errors import NotYetCompared, PairHeld
from keystrata.registry import cache
from keystrata.registry.principals import Caller
from keystrata.restore.points import pair_and_partner
from keystrata.restore.rules import Behind
from keystrata.storage.models import ID_LEN, PairHold, Principal

#: ``ctx.process_state`` key: partner stations this process has not compared a pair with since
#: it started (restore check). Their pairs serve nothing here until compared.
_UNVERIFIED_PARTNERS = "progress.unverified"


def unverified(ctx: NodeContext) -> set[str]:
    """This process's partners not yet compared since start (a shared, mutable set)."""
    found: set[str] = ctx.process_state.setdefault(_UNVERIFIED_PARTNERS, set())
    return found


@dataclass(frozen=True)
class OpenHold:
    """An open finding of the restore check: which station of the pair is behind, why,
    and by how much."""

    pair_id: str
    partner: str
    behind: str
    reason: str
    segments: int
    bytes_behind: int


def refuse_if_held(ctx: NodeContext, caller: Caller, other_sae_id: str) -> None:
    """Raise :class:`PairHeld` (503) when the pair between this station and the station
    of ``other_sae_id`` is held because this station is behind. From the registry
    snapshot (:mod:`keystrata.registry.cache`: holds raise the generation too);
    requests that are not from an SAE of this station go on to be refused as usual.

    Raises:
        NotYetCompared: this process has not compared the pair with that station yet.
    """
    if caller.role.value != "sae" or caller.station_id != ctx.node_id:
        return
    snapshot = cache.at_least(ctx, caller.generation)
    pending = unverified(ctx)
    held = snapshot.get("holds.self", None, lambda: _held_partners(ctx))
    if not pending and not held:
        return
    partner = snapshot.get(
        "principal.station", other_sae_id, lambda: _station_of(ctx, other_sae_id)
    )
    if pending and partner is not None and partner in pending:
        raise NotYetCompared()
    if partner is not None and partner in held:
        raise PairHeld()


def _held_partners(ctx: NodeContext) -> frozenset[str]:
    """Partner stations of the pairs held here because this station is behind."""
    with ctx.db.read() as s:
        return frozenset(
            str(p)
            for p in s.execute(
                select(PairHold.partner).where(
                    PairHold.released_at.is_(None), PairHold.behind == Behind.SELF.value
                )
            ).scalars()
        )


def _station_of(ctx: NodeContext, sae_id: str) -> str | None:
    """The station of principal ``sae_id``, retired or not (None: no such principal)."""
    if len(sae_id) > ID_LEN:
        return None
    with ctx.db.read() as s:
        row = s.get(Principal, sae_id)
        return None if row is None or row.station_id is None else str(row.station_id)


def refuse_pair_if_held(ctx: NodeContext, pair_id: str) -> None:
    """Raise :class:`PairHeld` when ``pair_id`` is held because this station is behind,
    :class:`NotYetCompared` when this process has not compared it yet."""
    if pair_id in {h.pair_id for h in open_holds(ctx) if h.behind == Behind.SELF.value}:
        raise PairHeld()
    pending = unverified(ctx)
    if pending:
        with ctx.db.read() as s:
            found = pair_and_partner(s, ctx, pair_id)
        if found is not None and found[1] in pending:
            raise NotYetCompared()


def open_holds(ctx: NodeContext) -> list[OpenHold]:
    """Every open finding at this station, by pair."""
    with ctx.db.read() as s:
        rows = s.execute(
            select(PairHold).where(PairHold.released_at.is_(None)).order_by(PairHold.id)
        ).scalars()
        return [
            OpenHold(r.pair_id, r.partner, r.behind, r.reason, r.segments, r.bytes_behind)
            for r in rows
        ]
