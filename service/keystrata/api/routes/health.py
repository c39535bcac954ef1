"""Liveness, readiness and Prometheus metrics of this node.

Like every route they need a client certificate of a known principal; identifying the
caller reads the database, so while the database is down these routes answer 503 with
``details`` naming the ``database`` check rather than 401.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Request, Response
from prometheus_client.exposition import choose_encoder

from keystrata.api.errors import error_responses
from keystrata.api.identity import admit
from keystrata.context import NodeContext
from keystrata.delivery.schemas import ErrorBody
from keystrata.errors import Unavailable
from keystrata.observability import metrics, readiness
from keystrata.observability.http import RequestMetrics
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole

router = APIRouter(prefix="/api/v1", tags=["observability"])

#: Who may ask: monitoring systems get a certificate of role ``monitor``, which opens
#: these routes and nothing else (besides ``/api/v1/node``).
LIVE_ROLES = (PrincipalRole.OPERATOR, PrincipalRole.AUDITOR, PrincipalRole.MONITOR)
READY_ROLES = (PrincipalRole.OPERATOR, PrincipalRole.MONITOR)
METRICS_ROLES = (PrincipalRole.OPERATOR, PrincipalRole.MONITOR)


def admit_or_report(*roles: PrincipalRole) -> Callable[[Request], Caller]:
    """``admit(*roles)``, but a database outage while identifying the caller is reported
    as the failing ``database`` check. Refusals are unchanged (401/403)."""
    inner = admit(*roles)

    def dependency(request: Request) -> Caller:
        try:
            return inner(request)
        except Unavailable as exc:
            raise Unavailable(
                "not ready: database",
                details=[{"check": "database", "problem": readiness.UNREACHABLE}],
            ) from exc

    dependency.roles = inner.roles  # type: ignore[attr-defined]
    dependency.refusal_status = inner.refusal_status  # type: ignore[attr-defined]
    return dependency


Live = Annotated[Caller, Depends(admit_or_report(*LIVE_ROLES))]
Ready = Annotated[Caller, Depends(admit_or_report(*READY_ROLES))]
Scraper = Annotated[Caller, Depends(admit_or_report(*METRICS_ROLES))]


@router.get(
    "/health/live",
    summary="The node process answers",
    operation_id="health_live",
    responses=error_responses(401, 403, 503),
)
def live(_: Live) -> dict[str, str]:
    return {"status": "live"}


@router.get(
    "/health/ready",
    summary="The node can serve: database, key-encryption key, ledger",
    operation_id="health_ready",
    responses=error_responses(401, 403)
    | {
        503: {
            "model": ErrorBody,
            "description": "a check failed; `details` names each failing check",
        }
    },
)
def ready(request: Request, _: Ready) -> dict[str, Any]:
    """200 with every check ``ok``, or 503 with the error object whose ``details`` list
    ``{"check", "problem"}`` for each failing check."""
    ctx: NodeContext = request.app.state.ctx
    result = readiness.assess(ctx)
    if not result.ready:
        raise Unavailable(
            "not ready: " + ", ".join(result.failing),
            details=[{"check": name, "problem": result.checks[name]} for name in result.failing],
        )
    return {"status": "ready", "checks": result.checks}


@router.get(
    "/metrics",
    summary="Prometheus metrics (text exposition format)",
    operation_id="metrics",
    response_class=Response,
    responses=error_responses(401, 403, 503) | {200: {"content": {"text/plain": {}}}},
)
def scrape(request: Request, _: Scraper) -> Response:
    """Database-derived families (the same from every worker) and this worker's request
    latency histogram, in the format the scraper's Accept header asks for."""
    ctx: NodeContext = request.app.state.ctx
    requests: RequestMetrics = request.app.state.request_metrics
    families = metrics.collect(ctx) + list(requests.collect())
    encode, content_type = choose_encoder(request.headers.get("accept", ""))
    return Response(
        content=encode(metrics.Families(families)), headers={"content-type": content_type}
    )
