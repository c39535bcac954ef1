"""Operator view of station pairs: buffers, relay rate, targets."""

from __future__ import annotations

from dataclasses import asdict
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Request

from keystrata.api.errors import error_responses
from keystrata.api.identity import admit
from keystrata.config import Role
from keystrata.context import NodeContext
from keystrata.delivery import accounting
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole
from keystrata.relay import buffers

router = APIRouter(prefix="/api/v1", tags=["pairs"])

Reader = Annotated[Caller, Depends(admit(PrincipalRole.OPERATOR, PrincipalRole.AUDITOR))]


@router.get(
    "/pairs",
    summary="Pair key buffers",
    operation_id="list_pair_buffers",
    responses=error_responses(401, 403, 503),
)
def list_pair_buffers(request: Request, _: Reader) -> dict[str, Any]:
    """At a relay: every pair's buffers at both stations (last reports), key on its
    way, relay rate, target and time until empty. At a station: this station's ready
    key per pair, by owner, and key waiting for confirmation."""
    ctx: NodeContext = request.app.state.ctx
    if ctx.role is Role.RELAY:
        return {
            "node_id": ctx.node_id,
            "role": "relay",
            "pairs": [asdict(v) for v in buffers.relay_view(ctx)],
        }
    return {"node_id": ctx.node_id, "role": "station", "pairs": buffers.station_view(ctx)}


@router.get(
    "/deliveries",
    summary="Key delivery accounting",
    operation_id="deliveries",
    responses=error_responses(401, 403, 503),
)
def deliveries(request: Request, _: Reader) -> dict[str, Any]:
    """Per pair and per SAE at this station: keys and bits handed to masters, fetched by
    slaves, waiting, expired; and refused requests per SAE."""
    ctx: NodeContext = request.app.state.ctx
    return accounting.deliveries(ctx)
