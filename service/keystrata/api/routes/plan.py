"""Key-supply plan: the link model applied to this node's registry, per link and per pair."""

from __future__ import annotations

from datetime import date
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Query, Request
from starlette.concurrency import run_in_threadpool

from keystrata.api.errors import error_responses
from keystrata.api.identity import admit
from keystrata.context import NodeContext
from keystrata.errors import InvalidInput
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole
from keystrata.supply import plan

router = APIRouter(prefix="/api/v1", tags=["planning"])

Reader = Annotated[
    Caller,
    Depends(admit(PrincipalRole.OPERATOR, PrincipalRole.AUDITOR, PrincipalRole.MONITOR)),
]


@router.get(
    "/plan",
    summary="Key-supply plan",
    operation_id="key_supply_plan",
    responses=error_responses(400, 401, 403, 503),
)
async def key_supply_plan(
    request: Request,
    _: Reader,
    day: Annotated[
        str | None,
        Query(description="UTC date to plan, YYYY-MM-DD; default: today on the node's clock"),
    ] = None,
) -> dict[str, Any]:
    """Per link: geometry, link budget, QBER, secret key rate beside the PLOB bound, the
    day by hour and the expected bits. Per pair: daily supply against demand, time until
    empty and the buffer that rides out a cloud spell. Engineering estimates, not a
    security proof (the answer's ``caution`` says so)."""
    ctx: NodeContext = request.app.state.ctx
    if day is None:
        when = ctx.clock.now().date()
    else:
        try:
            when = date.fromisoformat(day)
        except ValueError:
            raise InvalidInput(
                f"day: {day!r} is not a date like 2026-06-21",
                details=[{"field": "day", "problem": "not a YYYY-MM-DD date"}],
            ) from None
    return await run_in_threadpool(plan.network_plan, ctx, when)
