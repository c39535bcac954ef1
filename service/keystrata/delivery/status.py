"""Get status (ETSI GS QKD 014): what a master SAE can ask of this station for a slave."""

from __future__ import annotations

from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.delivery.enc_keys import MAX_KEY_PER_REQUEST, MAX_SAE_ID_COUNT
from keystrata.delivery.routing import route_for_master
from keystrata.registry.principals import Caller
from keystrata.relay.segment_states import SegmentState
from keystrata.storage.models import PairSegment


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
                PairSegment.state == SegmentState.READY,
            )
        ).scalar_one()
    )
