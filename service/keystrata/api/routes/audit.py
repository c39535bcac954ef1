"""Auditor routes (role ``auditor``, read-only): ledger entries, signed checkpoints with
the node's public key, and RFC 9162 inclusion and consistency proofs."""

from __future__ import annotations

import base64
from datetime import datetime
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Query, Request

from keystrata.api.errors import error_responses
from keystrata.api.identity import admit
from keystrata.context import NodeContext
from keystrata.delivery import accounting
from keystrata.errors import InvalidInput, NotFound
from keystrata.ids import ID_PATTERN
from keystrata.ledger import checkpoints, proofs, search
from keystrata.ledger.entries import Event, Ref
from keystrata.registry.specs import PrincipalRole

router = APIRouter(prefix="/api/v1/audit", tags=["audit"])

Auditor = Annotated[Any, Depends(admit(PrincipalRole.AUDITOR))]
Reader = Annotated[Any, Depends(admit(PrincipalRole.AUDITOR, PrincipalRole.OPERATOR))]
Index = Annotated[int, Query(ge=0, le=2**62)]
MAX_ENTRIES = 1000
Name = Annotated[str | None, Query(pattern=ID_PATTERN)]
KeyId = Annotated[str | None, Query(pattern=r"^[0-9a-fA-F-]{36}$")]
Moment = Annotated[str | None, Query(max_length=40, description="RFC 3339 with offset")]


def _ctx(request: Request) -> NodeContext:
    ctx: NodeContext = request.app.state.ctx
    return ctx


@router.get(
    "/checkpoints/latest",
    summary="Latest signed checkpoint",
    operation_id="latest_checkpoint",
    responses=error_responses(401, 403, 404, 503),
)
def latest_checkpoint(request: Request, _: Auditor) -> dict[str, Any]:
    ctx = _ctx(request)
    found = checkpoints.latest(ctx)
    if found is None:
        raise NotFound("no checkpoint signed yet")
    return found.to_json(checkpoints.public_key(ctx))


@router.get(
    "/checkpoints",
    summary="Signed checkpoints, newest first",
    operation_id="list_checkpoints",
    responses=error_responses(400, 401, 403, 503),
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


@router.get(
    "/entries",
    summary="Ledger entries by index",
    operation_id="list_entries",
    responses=error_responses(400, 401, 403, 503),
)
def list_entries(
    request: Request, _: Auditor, start: Index = 0, end: Index | None = None
) -> dict[str, Any]:
    """Entries ``start <= index < end`` (at most 1000): index, the canonical bytes in
    Base64 and the decoded entry."""
    stop = start + MAX_ENTRIES if end is None else min(end, start + MAX_ENTRIES)
    return {"entries": search.entries(_ctx(request), start, stop)}


def _moment(name: str, value: str | None) -> datetime | None:
    if value is None:
        return None
    try:
        moment = datetime.fromisoformat(value)
    except ValueError:
        moment = None
    if moment is None or moment.tzinfo is None:
        raise InvalidInput(
            f"{name}: expected an RFC 3339 time with offset, e.g. 2026-12-01T00:00:00Z",
            details=[{"field": name}],
        )
    return moment


def _events(values: list[str]) -> list[Event]:
    known = {str(e) for e in Event}
    unknown = [v for v in values if v not in known]
    if unknown:
        raise InvalidInput(
            "event: unknown event name (see the ledger event table)", details=[{"field": "event"}]
        )
    return [Event(v) for v in values]


@router.get(
    "/search",
    summary="Search ledger entries",
    operation_id="search_entries",
    responses=error_responses(400, 401, 403, 503),
)
def search_entries(
    request: Request,
    _: Auditor,
    since: Moment = None,
    until: Moment = None,
    event: Annotated[list[str], Query(max_length=len(Event))] = [],  # noqa: B006
    pair: Name = None,
    sae: Name = None,
    node: Name = None,
    segment: KeyId = None,
    key_id: KeyId = None,
    after: Index | None = None,
    limit: Annotated[int, Query(ge=1, le=search.MAX_PAGE)] = 100,
) -> dict[str, Any]:
    """Entries recorded in ``[since, until)``, of any of the ``event`` names, naming the
    given pair, SAE, node, segment and key ID (all filters must hold), oldest first.
    Page on with ``after`` = the ``next_after`` of the previous answer."""
    named = {Ref.PAIR: pair, Ref.SAE: sae, Ref.NODE: node, Ref.SEGMENT: segment}
    named[Ref.KEY] = key_id.lower() if key_id else None
    filters = search.Filters(
        since=_moment("since", since),
        until=_moment("until", until),
        events=_events(event),
        refs=[(k, v) for k, v in named.items() if v is not None],
    )
    page, cursor = search.search(_ctx(request), filters, after=after, limit=limit)
    return {"entries": page, "next_after": cursor}


@router.get(
    "/proofs/inclusion",
    summary="RFC 9162 inclusion proof",
    operation_id="inclusion_proof",
    responses=error_responses(400, 401, 403, 503),
)
def inclusion_proof(
    request: Request, _: Auditor, index: Index, tree_size: Index | None = None
) -> dict[str, Any]:
    size, proof = proofs.inclusion(_ctx(request), index, tree_size)
    return {
        "index": index,
        "tree_size": size,
        "audit_path": [base64.b64encode(p).decode() for p in proof],
    }


@router.get(
    "/proofs/consistency",
    summary="RFC 9162 consistency proof",
    operation_id="consistency_proof",
    responses=error_responses(400, 401, 403, 503),
)
def consistency_proof(
    request: Request, _: Auditor, first: Index, second: Index | None = None
) -> dict[str, Any]:
    size, proof = proofs.consistency(_ctx(request), first, second)
    return {"first": first, "second": size, "proof": [base64.b64encode(p).decode() for p in proof]}


@router.get(
    "/accounting",
    summary="Accounting per day",
    operation_id="daily_accounting",
    responses=error_responses(400, 401, 403, 503),
)
def daily_accounting(
    request: Request, _: Reader, since: Moment = None, until: Moment = None
) -> dict[str, Any]:
    """Per UTC day, per pair and per SAE, from this node's ledger: keys and bits handed to
    masters and fetched by slaves, expired, refused; at a relay, the segments made and
    the link key they used."""
    return accounting.per_day(_ctx(request), _moment("since", since), _moment("until", until))
