"""Auditor routes (role ``auditor``, read-only): ledger entries, signed checkpoints with
the node's public key, and RFC 9162 inclusion and consistency proofs."""

from __future__ import annotations

import base64
import json
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Query, Request
from sqlalchemy import select

from keystrata.api.identity import admit
from keystrata.domain.registry import PrincipalRole
from keystrata.errors import InvalidInput, NotFound
from keystrata.services import checkpoints
from keystrata.services.context import NodeContext
from keystrata.services.ledger import StoredTree
from keystrata.storage.models import LedgerEntry

router = APIRouter(prefix="/api/v1/audit", tags=["audit"])

Auditor = Annotated[Any, Depends(admit(PrincipalRole.AUDITOR))]
Index = Annotated[int, Query(ge=0, le=2**62)]
MAX_ENTRIES = 1000


def _ctx(request: Request) -> NodeContext:
    ctx: NodeContext = request.app.state.ctx
    return ctx


@router.get(
    "/checkpoints/latest", summary="Latest signed checkpoint", operation_id="latest_checkpoint"
)
def latest_checkpoint(request: Request, _: Auditor) -> dict[str, Any]:
    ctx = _ctx(request)
    found = checkpoints.latest(ctx)
    if found is None:
        raise NotFound("no checkpoint signed yet")
    return found.to_json(checkpoints.public_key(ctx))


@router.get(
    "/checkpoints", summary="Signed checkpoints, newest first", operation_id="list_checkpoints"
)
def list_checkpoints(
    request: Request,
    _: Auditor,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
    before: Index | None = None,
) -> dict[str, Any]:
    ctx = _ctx(request)
    public = checkpoints.public_key(ctx)
    return {
        "checkpoints": [
            c.to_json(public) for c in checkpoints.history(ctx, limit=limit, before=before)
        ]
    }


@router.get("/entries", summary="Ledger entries by index", operation_id="list_entries")
def list_entries(
    request: Request, _: Auditor, start: Index = 0, end: Index | None = None
) -> dict[str, Any]:
    """Entries ``start <= index < end`` (at most 1000): index, the canonical bytes in
    Base64 and the decoded entry."""
    stop = start + MAX_ENTRIES if end is None else min(end, start + MAX_ENTRIES)
    with _ctx(request).db.read() as s:
        rows = s.execute(
            select(LedgerEntry.idx, LedgerEntry.entry)
            .where(LedgerEntry.idx >= start, LedgerEntry.idx < stop)
            .order_by(LedgerEntry.idx)
        ).all()
    return {
        "entries": [
            {"index": int(i), "entry_b64": base64.b64encode(e).decode(), "entry": json.loads(e)}
            for i, e in rows
        ]
    }


def _tree_size(s: Any, size: int | None) -> int:
    current, _ = StoredTree(s).head()
    if size is None:
        return current
    if size > current:
        raise InvalidInput(f"tree_size: the ledger holds {current} entries")
    return size


@router.get("/proofs/inclusion", summary="RFC 9162 inclusion proof", operation_id="inclusion_proof")
def inclusion_proof(
    request: Request, _: Auditor, index: Index, tree_size: Index | None = None
) -> dict[str, Any]:
    with _ctx(request).db.read() as s:
        size = _tree_size(s, tree_size)
        if index >= size:
            raise InvalidInput(f"index: must be below tree_size {size}")
        proof = StoredTree(s).inclusion_proof(index, size)
    return {
        "index": index,
        "tree_size": size,
        "audit_path": [base64.b64encode(p).decode() for p in proof],
    }


@router.get(
    "/proofs/consistency", summary="RFC 9162 consistency proof", operation_id="consistency_proof"
)
def consistency_proof(
    request: Request, _: Auditor, first: Index, second: Index | None = None
) -> dict[str, Any]:
    with _ctx(request).db.read() as s:
        size = _tree_size(s, second)
        if not 0 < first <= size:
            raise InvalidInput(f"first: must be between 1 and {size}")
        proof = StoredTree(s).consistency_proof(first, size)
    return {"first": first, "second": size, "proof": [base64.b64encode(p).decode() for p in proof]}
