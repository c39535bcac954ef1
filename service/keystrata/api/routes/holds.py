"""Pairs held by the restore check (restore/holds.py): list them, release one."""

from __future__ import annotations

from dataclasses import asdict
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Request
from pydantic import BaseModel, ConfigDict, Field
from starlette.concurrency import run_in_threadpool

from keystrata.api.errors import error_responses
from keystrata.api.identity import admit
from keystrata.config import Role
from keystrata.context import NodeContext
from keystrata.errors import NotFound, Unavailable
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole
from keystrata.restore import holds, release

router = APIRouter(prefix="/api/v1", tags=["pairs"])

Reader = Annotated[Caller, Depends(admit(PrincipalRole.OPERATOR, PrincipalRole.AUDITOR))]
Operator = Annotated[Caller, Depends(admit(PrincipalRole.OPERATOR))]


class Release(BaseModel):
    """Why the operator releases the hold (recorded in the ledger and the hold row)."""

    model_config = ConfigDict(extra="forbid", strict=True)
    reason: str = Field(min_length=1, max_length=release.MAX_REASON)


@router.get(
    "/pairs/holds",
    summary="Open findings of the restore check",
    operation_id="list_pair_holds",
    responses=error_responses(401, 403, 503),
)
def list_holds(request: Request, _: Reader) -> dict[str, Any]:
    """Each open finding: pair, partner, ``behind`` (``self``: this station lost commits
    and the pair is held here; ``partner``: the partner did), reason, segments, bytes."""
    ctx: NodeContext = request.app.state.ctx
    return {"holds": [asdict(h) for h in holds.open_holds(ctx)]}


@router.post(
    "/pairs/{pair_id}/hold/release",
    summary="Release a pair held because this station is behind its partner",
    operation_id="release_pair_hold",
    responses=error_responses(400, 401, 403, 404, 409, 503),
)
async def release_hold(
    pair_id: str, body: Release, request: Request, caller: Operator
) -> dict[str, Any]:
    """Asks the partner for its points, then in one transaction moves this station's
    consumption points up to the partner's (destroying the bytes in between) and, after
    a non-owner loss, destroys the keys waiting here; closes the hold. 409 when the pair
    is not held here, 503 when the partner cannot be asked."""
    ctx: NodeContext = request.app.state.ctx
    if ctx.role is not Role.STATION:
        raise NotFound("only stations hold pairs")

    source = request.app.state.progress_source
    if source is None:
        raise Unavailable("this process cannot ask the partner station now")
    return await run_in_threadpool(
        release.release, ctx, source, pair_id, actor=caller.principal_id, reason=body.reason
    )
