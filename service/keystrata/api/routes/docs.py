"""The API's own description, for operators and monitors only: the OpenAPI document and
a documentation page drawn from it.

They map every route, parameter and body of the node; the callers who need that are the
operator who provisions and the monitoring that watches. Both are served through the
same identity dependency as every other route. The page (``/docs``) is our own
self-contained HTML (:mod:`keystrata.api.docs_page`): no script, nothing fetched from
elsewhere; FastAPI's interactive pages, which load their code from a CDN, stay off.
"""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Request, Response
from fastapi.routing import APIRoute

from keystrata.api import docs_page
from keystrata.api.errors import error_responses
from keystrata.api.identity import admit
from keystrata.context import NodeContext
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole

router = APIRouter(tags=["documentation"])

Reader = Annotated[Caller, Depends(admit(PrincipalRole.OPERATOR, PrincipalRole.MONITOR))]


@router.get("/openapi.json", include_in_schema=False, operation_id="openapi_document")
def openapi_document(request: Request, _: Reader) -> dict[str, Any]:
    """The OpenAPI document of this node's routes (as FastAPI builds it)."""
    document: dict[str, Any] = request.app.openapi()
    return document


def route_facts(route: APIRoute) -> docs_page.RouteFacts:
    """What the page shows of ``route`` beside the document: its roles come from the
    identity dependency (``admit`` marks them on the function)."""
    roles: set[str] = set()
    for dependency in route.dependant.dependencies:
        roles |= {str(r.value) for r in getattr(dependency.call, "roles", frozenset())}
    doc = (route.endpoint.__doc__ or "").strip().split("\n\n")[0]
    return docs_page.RouteFacts(
        path=route.path,
        methods=tuple(sorted(route.methods or ())),
        tag=str(route.tags[0]) if route.tags else "other",
        summary=route.summary or " ".join(doc.split()) or route.name,
        roles=tuple(sorted(roles)),
        in_document=route.include_in_schema,
    )


@router.get(
    "/docs",
    summary="API documentation page (HTML drawn from the OpenAPI document)",
    operation_id="documentation_page",
    response_class=Response,
    responses=error_responses(401, 403, 503) | {200: {"content": {"text/html": {}}}},
)
def documentation_page(request: Request, _: Reader) -> Response:
    """Every route of this node grouped by tag: method, path, roles, summary, parameters,
    request body and answers, and the schemas they name."""
    page: bytes | None = getattr(request.app.state, "documentation_page", None)
    if page is None:
        ctx: NodeContext = request.app.state.ctx
        # Imported here: the app module imports this router to build the route table.
        from keystrata.api.app import route_table

        routes = [route_facts(route) for route in route_table()]
        heading = f"API of keystrata node {ctx.node_id} ({ctx.role.value})"
        page = docs_page.render(request.app.openapi(), routes, heading).encode()
        request.app.state.documentation_page = page  # the routes never change
    return Response(
        page,
        media_type="text/html",
        headers={
            "content-security-policy": docs_page.CONTENT_SECURITY_POLICY,
            "x-content-type-options": "nosniff",
            "referrer-policy": "no-referrer",
            "cache-control": "no-store",
        },
    )
