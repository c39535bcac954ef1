"""Node-to-node routes (role ``peer``): relay and segment messages, buffer reports.

``POST /api/v1/peer/messages/batch`` carries several messages of one sender in order
(the outbox sends this way) and answers 200 with one result per message attempted
(:class:`keystrata.peering.messages.MessageResult`): ``{"status": 200, "segment_id",
"outcome"}`` when the message is applied (or was already), else the status and message
of its refusal: 409 when it cannot be applied yet (the sender's outbox retries) or would
reuse link key, 400 for a malformed message, 403 for a claim that is not the sender's.
It stops at the first message not applied.

``GET /api/v1/peer/registry/shared`` answers the registry facts this node shares with
the caller's own node (registry/comparison.py), and nothing about pairs, links or SAEs
the caller is not part of.
"""

from __future__ import annotations

import json
import logging
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Request
from fastapi.exceptions import RequestValidationError
from pydantic import BaseModel, ConfigDict, Field, ValidationError
from starlette.concurrency import run_in_threadpool

from keystrata.api.errors import error_responses
from keystrata.api.identity import admit
from keystrata.config import Role
from keystrata.context import NodeContext
from keystrata.errors import InvalidInput, NotFound
from keystrata.node import dispatch
from keystrata.peering import outbox
from keystrata.peering.answers import SharedRegistry
from keystrata.peering.messages import MAX_BATCH, MessageResult
from keystrata.registry import comparison
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole
from keystrata.relay import buffers
from keystrata.restore import holds, points

router = APIRouter(prefix="/api/v1/peer", tags=["peer"])

Peer = Annotated[Caller, Depends(admit(PrincipalRole.PEER))]

log = logging.getLogger("keystrata.api")


class MessageBatch(BaseModel):
    """Messages from one peer, applied in this order."""

    model_config = ConfigDict(extra="forbid", strict=True)
    messages: list[dict[str, Any]] = Field(min_length=1, max_length=MAX_BATCH)


class BatchResults(BaseModel):
    """One result per message attempted, in order; the last is the refusal, if any."""

    results: list[MessageResult]


async def _json_body(request: Request) -> Any:
    """The request body as JSON; called only after the identity dependency admitted the
    caller, so that no one else makes the node read and parse up to the body limit."""
    try:
        return json.loads(await request.body())
    except ValueError:
        raise InvalidInput("body: not JSON") from None


#: The batch body as the OpenAPI document describes it: the body is read by the handler
#: only after the caller is known to be a peer, so FastAPI does not parse it itself.
_BATCH_BODY = {
    "requestBody": {
        "required": True,
        "content": {"application/json": {"schema": MessageBatch.model_json_schema()}},
    }
}


@router.post(
    "/messages/batch",
    summary="Deliver several relay or segment messages in order",
    operation_id="peer_message_batch",
    response_model=BatchResults,
    responses=error_responses(400, 401, 403, 413, 503),
    openapi_extra=_BATCH_BODY,
)
async def peer_message_batch(request: Request, caller: Peer) -> BatchResults:
    """Each message is applied in its own transaction, as if sent alone; a message that
    is not applied (not yet, refused) ends the run, and the sender sends it and those
    after it again later. A batch holding anything that is not a message this node takes
    is refused whole (400) before any message is applied."""
    ctx: NodeContext = request.app.state.ctx
    assert caller.node_id is not None  # peers are bound to a node (registry rule)
    try:
        batch = MessageBatch.model_validate(await _json_body(request))
    except ValidationError as exc:
        errors = exc.errors(include_input=False, include_url=False)
        raise RequestValidationError([{**e, "loc": ("body", *e["loc"])} for e in errors]) from None
    results = await run_in_threadpool(
        dispatch.handle_batch, ctx, caller.node_id, list(batch.messages)
    )
    for result in results:
        if result.status >= 500:
            log.warning("peer message failed: %s (%d)", result.message, result.status)
    return BatchResults(results=results)


@router.get(
    "/pairs/{pair_id}/buffer",
    summary="A station's key buffer for a pair",
    operation_id="peer_pair_buffer",
    responses=error_responses(401, 403, 404, 503),
)
def pair_buffer(pair_id: str, request: Request, caller: Peer) -> dict[str, Any]:
    ctx: NodeContext = request.app.state.ctx
    if ctx.role is not Role.STATION:
        raise NotFound("only stations keep pair buffers")
    assert caller.node_id is not None  # peers are bound to a node (registry rule)
    holds.refuse_pair_if_held(ctx, pair_id)  # a held pair tells the relay nothing new
    return buffers.report_for_relay(ctx, pair_id, caller.node_id).to_json()


@router.get(
    "/allocations",
    summary="Key allocations still on their way to the calling station",
    operation_id="peer_pending_allocations",
    responses=error_responses(401, 403, 503),
)
def pending_allocations(request: Request, caller: Peer) -> dict[str, Any]:
    """A station asked for a key ID it has not heard of pulls them here: the
    ``key.allocated`` message may still be in this node's outbox."""
    ctx: NodeContext = request.app.state.ctx
    assert caller.node_id is not None
    return {
        "messages": outbox.pending_bodies(ctx.db, destination=caller.node_id, kind="key.allocated")
    }


@router.get(
    "/pairs/{pair_id}/progress",
    summary="This station's consumption point of each segment of a pair (one page)",
    operation_id="peer_pair_progress",
    responses=error_responses(400, 401, 403, 404, 503),
)
def pair_progress(
    pair_id: str, request: Request, caller: Peer, after: str | None = None
) -> dict[str, Any]:
    """For the pair's other station only (else 403): ``points`` (segment_id, owner,
    used, unacked) ordered by segment ID, at most 1000; ``next_after`` pages on. No key
    material. The restore check of restore/comparison.py compares them."""
    ctx: NodeContext = request.app.state.ctx
    if ctx.role is not Role.STATION:
        raise NotFound("only stations keep pair segments")
    if after is not None and len(after) > 36:
        raise InvalidInput("after: a segment ID", details=[{"field": "after"}])
    assert caller.node_id is not None  # peers are bound to a node (registry rule)
    return points.report(ctx, caller.node_id, pair_id, after)


@router.get(
    "/registry/shared",
    summary="The registry facts this node shares with the calling node",
    operation_id="peer_registry_shared",
    responses=error_responses(401, 403, 503),
)
def registry_shared(request: Request, caller: Peer) -> dict[str, Any]:
    """Pairs both nodes belong to, the QKD links between them, the nodes those name and,
    for two stations of a pair, both stations' SAEs: from this node's rows, for the
    node the caller's principal is bound to (nothing the request names). No key
    material; the caller compares them with its own (node/registry_watch.py)."""
    ctx: NodeContext = request.app.state.ctx
    assert caller.node_id is not None  # peers are bound to a node (registry rule)
    facts = comparison.shared_facts(ctx, caller.node_id)
    return SharedRegistry.model_validate(facts).to_json()
