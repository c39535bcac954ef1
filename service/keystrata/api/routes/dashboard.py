"""The operators' dashboard (roles operator and monitor): two pages, their static files,
and the JSON they read: this node's overview, the network its registry holds, and the
history of one series.

The pages and files are package data (``api/dashboard/``): hand-written HTML, CSS and
JavaScript that draw their tables, map and plots as SVG in the browser, with nothing
fetched from anywhere but the nodes themselves. Answers carry no key material and no key
IDs (observability/dashboard.py, node/history.py).
"""

from __future__ import annotations

from datetime import datetime, timedelta
from functools import lru_cache
from importlib import resources
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Query, Request, Response

from keystrata.api.errors import error_responses
from keystrata.api.identity import admit
from keystrata.context import NodeContext
from keystrata.errors import InvalidInput
from keystrata.ids import ID_PATTERN
from keystrata.node import history
from keystrata.observability import dashboard
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole

router = APIRouter(tags=["dashboard"])

Viewer = Annotated[Caller, Depends(admit(PrincipalRole.OPERATOR, PrincipalRole.MONITOR))]

#: Static files under ``/dashboard/assets/`` and their media types.
ASSETS = {
    "dashboard.css": "text/css; charset=utf-8",
    "common.js": "text/javascript; charset=utf-8",
    "node.js": "text/javascript; charset=utf-8",
    "network.js": "text/javascript; charset=utf-8",
    "icon.svg": "image/svg+xml",
}
#: Most points per subject one history answer holds.
MAX_POINTS = 2000
#: The span of a history answer when ``since`` is absent.
DEFAULT_SPAN = timedelta(hours=1)


@lru_cache(maxsize=16)
def _file(name: str) -> bytes:
    return (resources.files("keystrata.api") / "dashboard" / name).read_bytes()


def _headers(connect: str = "'self'") -> dict[str, str]:
    """No framing, no inline script or style, no referrer; fetches only to ``connect``."""
    return {
        "content-security-policy": (
            "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; "
            f"connect-src {connect}; base-uri 'none'; form-action 'none'; "
            "frame-ancestors 'none'"
        ),
        "x-content-type-options": "nosniff",
        "referrer-policy": "no-referrer",
        "cache-control": "no-store",
    }


def _ctx(request: Request) -> NodeContext:
    ctx: NodeContext = request.app.state.ctx
    return ctx


@router.get(
    "/dashboard",
    summary="Dashboard page of this node",
    operation_id="dashboard_page",
    response_class=Response,
    responses=error_responses(401, 403, 503) | {200: {"content": {"text/html": {}}}},
)
def node_page(_: Viewer) -> Response:
    return Response(_file("index.html"), media_type="text/html", headers=_headers())


@router.get(
    "/dashboard/network",
    summary="Dashboard page of the whole network this node's registry holds",
    operation_id="dashboard_network_page",
    response_class=Response,
    responses=error_responses(401, 403, 503) | {200: {"content": {"text/html": {}}}},
)
def network_page(request: Request, _: Viewer) -> Response:
    """The page asks every node with a URL directly, so it may connect to their origins."""
    origins = sorted(dashboard.allowed_origins(_ctx(request)))
    connect = " ".join(["'self'", *origins])
    return Response(_file("network.html"), media_type="text/html", headers=_headers(connect))


def _asset_route(name: str, media_type: str) -> None:
    def asset(_: Viewer) -> Response:
        return Response(_file(name), media_type=media_type, headers=_headers())

    router.add_api_route(
        f"/dashboard/assets/{name}",
        asset,
        methods=["GET"],
        summary=f"Dashboard file {name}",
        operation_id="dashboard_asset_" + name.replace(".", "_"),
        response_class=Response,
        responses=error_responses(401, 403, 503),
    )


for _name, _media in ASSETS.items():
    _asset_route(_name, _media)


@router.get(
    "/api/v1/dashboard/overview",
    summary="This node now: links, pairs, deliveries, readiness",
    operation_id="dashboard_overview",
    responses=error_responses(401, 403, 503),
)
def overview(request: Request, _: Viewer) -> dict[str, Any]:
    """Identity and position; per link rate, QBER, pool, planned rate and share of plan;
    per pair ready key, target, time until empty; key delivery counts; every readiness
    check, and the notes of those not ``ok`` as alerts."""
    return dashboard.overview(_ctx(request))


@router.get(
    "/api/v1/dashboard/network",
    summary="The nodes, links and pairs of this node's registry, for the map",
    operation_id="dashboard_network",
    responses=error_responses(401, 403, 503),
)
def network(request: Request, _: Viewer) -> dict[str, Any]:
    return dashboard.network(_ctx(request))


def _moment(value: str | None, field: str) -> datetime | None:
    if value is None:
        return None
    try:
        parsed = datetime.fromisoformat(value)
    except ValueError:
        parsed = None
    if parsed is None or parsed.tzinfo is None:
        raise InvalidInput(
            f"{field}: give a time in RFC 3339 with an offset, such as 2026-12-04T10:00:00Z",
            details=[{"field": field, "problem": "not an RFC 3339 time with an offset"}],
        )
    return parsed


@router.get(
    "/api/v1/dashboard/history",
    summary="The history of one series: samples per link or pair",
    operation_id="dashboard_history",
    responses=error_responses(400, 401, 403, 503),
)
def series_history(
    request: Request,
    _: Viewer,
    series: Annotated[str, Query(max_length=32, description="one of the series listed")],
    subject: Annotated[str | None, Query(pattern=ID_PATTERN)] = None,
    since: Annotated[str | None, Query(max_length=40, description="RFC 3339")] = None,
    until: Annotated[str | None, Query(max_length=40, description="RFC 3339")] = None,
    points: Annotated[int, Query(ge=2, le=MAX_POINTS)] = 500,
) -> dict[str, Any]:
    """Samples of ``series`` between ``since`` (default: an hour before ``until``) and
    ``until`` (default: now), for ``subject`` or every link or pair that has some, at
    most ``points`` per subject, evenly thinned. Points are ``[unix_seconds, value]``."""
    if series not in history.SERIES:
        raise InvalidInput(
            "series: not a series of this node; one of " + ", ".join(history.SERIES),
            details=[{"field": "series", "problem": "unknown series"}],
        )
    ctx = _ctx(request)
    end = _moment(until, "until") or ctx.clock.now()
    start = _moment(since, "since") or end - DEFAULT_SPAN
    if start > end:
        raise InvalidInput(
            "since: must not be after until",
            details=[{"field": "since", "problem": "after until"}],
        )
    found = history.points(ctx, series, subject=subject, since=start, until=end, limit=points)
    meta = history.SERIES[series]
    return {
        "node_id": ctx.node_id,
        "series": series,
        "unit": meta.unit,
        "title": meta.title,
        "since": start.isoformat(),
        "until": end.isoformat(),
        "sample_seconds": ctx.settings.dashboard.sample_seconds,
        "subjects": [{"subject": p.subject, "points": p.points} for p in found],
    }
