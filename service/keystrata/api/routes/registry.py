"""Registry routes: operators provision, auditors read."""

# No `from __future__ import annotations` here: FastAPI must see the body classes
# bound in _routes() as real objects, not as names it cannot resolve.

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Query, Request, status

from keystrata.api.errors import error_responses
from keystrata.api.identity import admit
from keystrata.context import NodeContext
from keystrata.registry import provisioning
from keystrata.registry.principals import Caller
from keystrata.registry.specs import (
    Kind,
    LinkChange,
    LinkSpec,
    NodeChange,
    NodeSpec,
    PairChange,
    PairSpec,
    PrincipalChange,
    PrincipalRole,
    PrincipalSpec,
)

router = APIRouter(prefix="/api/v1/registry", tags=["registry"])

Operator = Annotated[Caller, Depends(admit(PrincipalRole.OPERATOR))]
Reader = Annotated[Caller, Depends(admit(PrincipalRole.OPERATOR, PrincipalRole.AUDITOR))]
IncludeRetired = Annotated[bool, Query(description="also list retired entries")]


def _ctx(request: Request) -> NodeContext:
    ctx: NodeContext = request.app.state.ctx
    return ctx


def _routes(kind: Kind, key: str, spec: type[Any], change: type[Any]) -> None:
    # One set of five routes per kind; FastAPI needs the concrete body types in the
    # signatures, so they are built here rather than written out four times.

    def create_entry(request: Request, caller: Operator, body: spec) -> dict[str, Any]:  # type: ignore[valid-type]
        return provisioning.create(_ctx(request), kind, body, actor=caller.principal_id)

    def list_entries(
        request: Request, _: Reader, include_retired: IncludeRetired = False
    ) -> dict[str, Any]:
        return {
            "items": provisioning.list_entries(_ctx(request), kind, include_retired=include_retired)
        }

    def get_entry(request: Request, _: Reader, entry_id: str) -> dict[str, Any]:
        return provisioning.get(_ctx(request), kind, entry_id)

    def change_entry(
        request: Request,
        caller: Operator,
        entry_id: str,
        body: change,  # type: ignore[valid-type]
    ) -> dict[str, Any]:
        return provisioning.change(_ctx(request), kind, entry_id, body, actor=caller.principal_id)

    def retire_entry(request: Request, caller: Operator, entry_id: str) -> dict[str, Any]:
        return provisioning.retire(_ctx(request), kind, entry_id, actor=caller.principal_id)

    base = f"/{kind.value}"
    item = base + "/{entry_id}"
    noun = kind.value.rstrip("s")
    router.add_api_route(
        base,
        create_entry,
        methods=["POST"],
        status_code=status.HTTP_201_CREATED,
        responses=error_responses(400, 401, 403, 409, 413, 503),
        summary=f"Create a {noun}",
        operation_id=f"create_{noun}",
    )
    router.add_api_route(
        base,
        list_entries,
        methods=["GET"],
        summary=f"List {kind.value}",
        responses=error_responses(400, 401, 403, 503),
        operation_id=f"list_{kind.value}",
    )
    router.add_api_route(
        item,
        get_entry,
        methods=["GET"],
        summary=f"Get a {noun}",
        operation_id=f"get_{noun}",
        responses=error_responses(401, 403, 404, 503),
    )
    router.add_api_route(
        item,
        change_entry,
        methods=["PATCH"],
        summary=f"Change a {noun}",
        responses=error_responses(400, 401, 403, 404, 409, 413, 503),
        operation_id=f"change_{noun}",
    )
    router.add_api_route(
        item,
        retire_entry,
        methods=["DELETE"],
        summary=f"Retire a {noun}",
        responses=error_responses(401, 403, 404, 409, 503),
        operation_id=f"retire_{noun}",
    )


_routes(Kind.NODES, "node_id", NodeSpec, NodeChange)
_routes(Kind.LINKS, "link_id", LinkSpec, LinkChange)
_routes(Kind.PAIRS, "pair_id", PairSpec, PairChange)
_routes(Kind.PRINCIPALS, "principal_id", PrincipalSpec, PrincipalChange)
