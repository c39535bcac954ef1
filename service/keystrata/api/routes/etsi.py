"""Key delivery to SAEs: the REST API of ETSI GS QKD 014 V1.1.1, base ``/api/v1/keys``.

Get status, Get key (POST and GET) and Get key with key IDs (POST and GET), with the
standard's objects and status codes: 200, 400 (bad request format), 401 (unauthorized,
the same answer for every reason) and 503 (error on the server side). Clause numbers and
wording of the standard are cited from memory in the conformance tests.

Every member of the Key request is optional, so a Get key POST without a body (no
content, whatever its headers say) is the default request, and a JSON body sent without
a content type is read as JSON (any other content type is a 400). Answers leave absent
optional members out instead of writing ``null`` (``response_model_exclude_none``).
"""

# No `from __future__ import annotations`: FastAPI reads the body model classes here.

import base64
from typing import Annotated, Any

from fastapi import APIRouter, Body, Depends, Query, Request
from starlette.concurrency import run_in_threadpool

from keystrata.api.identity import admit
from keystrata.config import Role
from keystrata.context import NodeContext
from keystrata.delivery import dec_keys, enc_keys, status
from keystrata.delivery.enc_keys import DeliveredKey
from keystrata.delivery.ports import AllocationSource
from keystrata.delivery.schemas import ErrorBody, KeyContainer, KeyIds, KeyRequest, Status
from keystrata.errors import NotFound
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole

# strict_content_type=False: a body that comes without any content type is read as JSON
# (FastAPI's strict default would refuse it); a body of another declared type is not.
router = APIRouter(
    prefix="/api/v1/keys",
    tags=["key delivery (ETSI GS QKD 014)"],
    strict_content_type=False,
)

Sae = Annotated[Caller, Depends(admit(PrincipalRole.SAE, hide_role=True))]

_ERRORS: dict[int | str, dict[str, Any]] = {
    400: {"model": ErrorBody, "description": "Bad request format"},
    401: {"model": ErrorBody, "description": "Unauthorized"},
    503: {"model": ErrorBody, "description": "Error on the server side"},
    # Any other client error has the same body; naming it keeps FastAPI from documenting
    # a 422 that the error handler never gives (it answers 400).
    "4XX": {"model": ErrorBody, "description": "Any other client error"},
}
#: The Key request of a POST that carries no body: the standard's defaults throughout.
_NO_BODY = Body(
    default_factory=KeyRequest,
    description="Key request; every member is optional, and so is the body itself",
)
KEY_ID_PATTERN = r"^[0-9a-fA-F]{8}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{12}$"


def _station(request: Request) -> NodeContext:
    ctx: NodeContext = request.app.state.ctx
    if ctx.role is not Role.STATION:
        raise NotFound("keys are delivered by stations, not by the relay")
    return ctx


def _container(keys: list[DeliveredKey]) -> dict[str, Any]:
    return {"keys": [{"key_ID": k.key_id, "key": base64.b64encode(k.key).decode()} for k in keys]}


def _allocation_source(request: Request) -> AllocationSource | None:
    """The port to owning stations the composition root gave the app."""
    source: AllocationSource | None = request.app.state.allocation_source
    return source


@router.get(
    "/{slave_SAE_ID}/status",
    response_model=Status,
    responses=_ERRORS,
    response_model_exclude_none=True,
    summary="Get status",
    operation_id="get_status",
)
def get_status(slave_SAE_ID: str, request: Request, caller: Sae) -> dict[str, Any]:
    return status.status(_station(request), caller, slave_SAE_ID)


@router.post(
    "/{slave_SAE_ID}/enc_keys",
    response_model=KeyContainer,
    responses=_ERRORS,
    response_model_exclude_none=True,
    summary="Get key",
    operation_id="get_key",
)
async def get_key(
    slave_SAE_ID: str,
    request: Request,
    caller: Sae,
    body: Annotated[KeyRequest, _NO_BODY],
) -> dict[str, Any]:
    ctx = _station(request)
    keys = await run_in_threadpool(enc_keys.get_keys, ctx, caller, slave_SAE_ID, body)
    return _container(keys)


@router.get(
    "/{slave_SAE_ID}/enc_keys",
    response_model=KeyContainer,
    responses=_ERRORS,
    response_model_exclude_none=True,
    summary="Get key (GET form)",
    operation_id="get_key_simple",
)
async def get_key_simple(
    slave_SAE_ID: str,
    request: Request,
    caller: Sae,
    number: Annotated[int | None, Query(ge=1)] = None,
    size: Annotated[int | None, Query(ge=1)] = None,
) -> dict[str, Any]:
    ctx = _station(request)
    body = KeyRequest(number=number, size=size)
    keys = await run_in_threadpool(enc_keys.get_keys, ctx, caller, slave_SAE_ID, body)
    return _container(keys)


@router.post(
    "/{master_SAE_ID}/dec_keys",
    response_model=KeyContainer,
    responses=_ERRORS,
    response_model_exclude_none=True,
    summary="Get key with key IDs",
    operation_id="get_key_with_key_ids",
)
async def get_key_with_ids(
    master_SAE_ID: str,
    body: KeyIds,
    request: Request,
    caller: Sae,
) -> dict[str, Any]:
    ctx = _station(request)
    ids = [entry.key_ID for entry in body.key_IDs]
    keys = await run_in_threadpool(
        dec_keys.get_keys_with_ids, ctx, caller, master_SAE_ID, ids, _allocation_source(request)
    )
    return _container(keys)


@router.get(
    "/{master_SAE_ID}/dec_keys",
    response_model=KeyContainer,
    responses=_ERRORS,
    response_model_exclude_none=True,
    summary="Get key with key IDs (GET form)",
    operation_id="get_key_with_key_id_simple",
)
async def get_key_with_id_simple(
    master_SAE_ID: str,
    request: Request,
    caller: Sae,
    key_ID: Annotated[str, Query(pattern=KEY_ID_PATTERN)],
) -> dict[str, Any]:
    ctx = _station(request)
    keys = await run_in_threadpool(
        dec_keys.get_keys_with_ids,
        ctx,
        caller,
        master_SAE_ID,
        [key_ID],
        _allocation_source(request),
    )
    return _container(keys)
