"""The API's own description: the OpenAPI document, for operators and monitors only.

It maps every route, parameter and body of the node; the callers who need it are the
operator who provisions and the monitoring that watches. It is served through the same
identity dependency as every other route (no interactive docs pages are served).
"""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Request

from keystrata.api.identity import admit
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole

router = APIRouter(tags=["documentation"])

Reader = Annotated[Caller, Depends(admit(PrincipalRole.OPERATOR, PrincipalRole.MONITOR))]


@router.get("/openapi.json", include_in_schema=False, operation_id="openapi_document")
def openapi_document(request: Request, _: Reader) -> dict[str, Any]:
    """The OpenAPI document of this node's routes (as FastAPI builds it)."""
    document: dict[str, Any] = request.app.openapi()
    return document
