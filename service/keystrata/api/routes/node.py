"""What a node says about itself to any known principal."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Request

from keystrata import __version__
from keystrata.api.errors import error_responses
from keystrata.api.identity import admit
from keystrata.context import NodeContext
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole

router = APIRouter(prefix="/api/v1", tags=["node"])

Anyone = Annotated[Caller, Depends(admit(*PrincipalRole))]


@router.get(
    "/node",
    summary="This node's identity",
    operation_id="node_info",
    responses=error_responses(401, 503),
)
def node_info(request: Request, _: Anyone) -> dict[str, Any]:
    ctx: NodeContext = request.app.state.ctx
    return {"node_id": ctx.node_id, "role": ctx.role.value, "version": __version__}
