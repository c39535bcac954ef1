"""Link key routes: QKD modules push blocks; operators and auditors read pool levels."""

from __future__ import annotations

import base64
import binascii
from dataclasses import asdict
from datetime import datetime
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Request
from pydantic import AwareDatetime, BaseModel, ConfigDict, Field, StringConstraints, ValidationError
from starlette.concurrency import run_in_threadpool

from keystrata.api.errors import error_responses
from keystrata.api.identity import admit
from keystrata.context import NodeContext
from keystrata.errors import InvalidInput, UnsupportedMediaType
from keystrata.links import ingest, pools
from keystrata.links.blocks import BlockIn, decode_batch
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole
from keystrata.supply import observed

router = APIRouter(prefix="/api/v1/links", tags=["link key"])

Module = Annotated[Caller, Depends(admit(PrincipalRole.QKD_MODULE))]
Reader = Annotated[Caller, Depends(admit(PrincipalRole.OPERATOR, PrincipalRole.AUDITOR))]

UUID_PATTERN = r"^[0-9a-fA-F]{8}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{12}$"


class BlockJson(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)
    block_id: Annotated[str, StringConstraints(pattern=UUID_PATTERN)]
    key: Annotated[str, StringConstraints(min_length=4, max_length=64 * 1024 * 1024)] = Field(
        description="key bytes, Base64 (RFC 4648 section 4)"
    )
    qber: Annotated[float, Field(ge=0, le=0.5)]
    epsilon: Annotated[float, Field(ge=0, lt=1)]
    produced_at: AwareDatetime


class BlocksJson(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True)
    blocks: Annotated[list[BlockJson], Field(min_length=1)]


class IngestAnswer(BaseModel):
    link_id: str
    accepted: int
    duplicates: int
    accepted_bits: int


class PoolAnswer(BaseModel):
    link_id: str
    peer_node_id: str
    bits_available: int
    bits_used: int
    bits_received: int
    blocks_available: int
    rate_bps: float
    window_seconds: int
    last_block_at: datetime | None
    qber: float | None = Field(
        description="mean QBER of the blocks received over the window (by length); null: none"
    )
    planned_rate_bps: float | None = Field(
        description="the link model's clear-sky rate for now; null without a profile"
    )
    plan_ratio: float | None = Field(description="rate_bps / planned_rate_bps")


class PoolsAnswer(BaseModel):
    node_id: str
    pools: list[PoolAnswer]


def _from_json(raw: bytes, max_blocks: int) -> list[BlockIn]:
    try:
        doc = BlocksJson.model_validate_json(raw)
    except ValidationError as exc:
        details = [
            {"field": ".".join(map(str, e["loc"])), "problem": e["msg"]} for e in exc.errors()[:20]
        ]
        raise InvalidInput(
            "invalid request: " + "; ".join(f"{d['field']}: {d['problem']}" for d in details[:3]),
            details=details,
        ) from None
    if len(doc.blocks) > max_blocks:
        raise InvalidInput(f"blocks: at most {max_blocks} blocks per request")
    out = []
    for i, b in enumerate(doc.blocks):
        try:
            key = base64.b64decode(b.key, validate=True)
        except (binascii.Error, ValueError):
            raise InvalidInput(
                f"blocks.{i}.key: not valid Base64 (RFC 4648 section 4)",
                details=[{"field": f"blocks.{i}.key", "problem": "not valid Base64"}],
            ) from None
        out.append(
            BlockIn(
                block_id=b.block_id.lower(),
                key=key,
                qber=b.qber,
                epsilon=b.epsilon,
                produced_at=b.produced_at,
            )
        )
    return out


def _inlined(model: type[BaseModel]) -> dict[str, Any]:
    """``model``'s JSON schema with its nested models written in place, so the body the
    OpenAPI document shows refers to nothing outside itself."""
    schema = model.model_json_schema()
    defs = schema.pop("$defs", {})

    def walk(node: Any) -> Any:
        if isinstance(node, dict):
            ref = node.get("$ref", "")
            if ref.startswith("#/$defs/"):
                return walk(defs[ref.removeprefix("#/$defs/")])
            return {k: walk(v) for k, v in node.items()}
        if isinstance(node, list):
            return [walk(v) for v in node]
        return node

    return walk(schema)  # type: ignore[no-any-return]


_INGEST_BODY = {
    "requestBody": {
        "required": True,
        "content": {
            "application/json": {"schema": _inlined(BlocksJson)},
            "application/octet-stream": {
                "schema": {
                    "type": "string",
                    "format": "binary",
                    "description": "version-1 binary block records (see DEVELOPERS.md)",
                }
            },
        },
    }
}


@router.post(
    "/{link_id}/blocks",
    response_model=IngestAnswer,
    openapi_extra=_INGEST_BODY,
    summary="Push link key blocks",
    operation_id="push_blocks",
    responses=error_responses(400, 401, 403, 404, 409, 413, 415, 503),
)
async def push_blocks(link_id: str, request: Request, caller: Module) -> dict[str, Any]:
    ctx: NodeContext = request.app.state.ctx
    limits = ctx.settings.ingest
    media = request.headers.get("content-type", "").split(";")[0].strip().lower()
    raw = await request.body()
    if media == "application/json":
        blocks = _from_json(raw, limits.max_blocks_per_request)
    elif media == "application/octet-stream":
        blocks = list(
            decode_batch(
                raw,
                max_block_bytes=limits.max_block_bytes,
                max_blocks=limits.max_blocks_per_request,
            )
        )
    else:
        raise UnsupportedMediaType(
            "send application/json or application/octet-stream (binary block records)"
        )
    result = await run_in_threadpool(
        ingest.ingest, ctx, link_id, blocks, actor=caller.principal_id, actor_link=caller.link_id
    )
    return asdict(result)


@router.get(
    "/pools",
    response_model=PoolsAnswer,
    summary="Link key pool levels",
    operation_id="list_pools",
    responses=error_responses(401, 403, 503),
)
def list_pools(request: Request, _: Reader) -> dict[str, Any]:
    ctx: NodeContext = request.app.state.ctx
    return {"node_id": ctx.node_id, "pools": _with_plan(ctx, pools.pool_levels(ctx))}


def _with_plan(ctx: NodeContext, levels: list[pools.PoolLevel]) -> list[dict[str, Any]]:
    checks = {c.link_id: c for c in observed.plan_checks(ctx, levels)}
    return [
        asdict(level)
        | {
            "planned_rate_bps": checks[level.link_id].planned_bps,
            "plan_ratio": checks[level.link_id].ratio,
        }
        for level in levels
    ]


@router.get(
    "/{link_id}/pool",
    response_model=PoolAnswer,
    summary="One link's pool level",
    operation_id="get_pool",
    responses=error_responses(401, 403, 404, 503),
)
def get_pool(link_id: str, request: Request, _: Reader) -> dict[str, Any]:
    ctx: NodeContext = request.app.state.ctx
    return _with_plan(ctx, pools.pool_levels(ctx, link_id))[0]
