"""One handler turns every error into the JSON error object ``{"message", "details"}``
(ETSI GS QKD 014's error object, :class:`keystrata.delivery.schemas.ErrorBody`, on every
route), without echoing any input value: a rejected value might be key material."""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from fastapi.routing import APIRoute
from starlette.exceptions import HTTPException

from keystrata.delivery.schemas import ErrorBody
from keystrata.errors import KeystrataError

log = logging.getLogger("keystrata.api")


#: What each error status means on this API, for the OpenAPI document.
_MEANING = {
    400: "Bad request: a parameter or the body is invalid; `details` names the fields",
    401: "Unauthorized: no client certificate, or one that maps to no active principal",
    403: "Forbidden: the caller's role may not use this route",
    404: "Not found",
    409: "Conflict with the node's state (already exists, or not applicable yet)",
    413: "Request body too large",
    415: "Unsupported content type",
    503: "Unavailable: the database, the ledger or a peer cannot be reached right now",
}


def error_responses(*statuses: int) -> dict[int | str, dict[str, Any]]:
    """Return the ``responses=`` that document a route's error answers: each of
    ``statuses`` with the error object, and ``4XX`` saying that any other client error
    (a method the path does not allow, say) has the same body. Naming ``4XX`` also keeps
    FastAPI from documenting a 422 answer that the handler below never gives."""
    out: dict[int | str, dict[str, Any]] = {
        s: {"model": ErrorBody, "description": _MEANING[s]} for s in sorted(statuses)
    }
    out["4XX"] = {"model": ErrorBody, "description": "Any other client error"}
    return out


def error_body(message: str, details: list[dict[str, Any]] | None = None) -> dict[str, Any]:
    body: dict[str, Any] = {"message": message}
    if details:
        body["details"] = details
    return body


def _validation_details(exc: RequestValidationError) -> list[dict[str, Any]]:
    out = []
    for err in exc.errors()[:20]:
        # Never include err["input"]: it may hold key bytes.
        loc = [str(p) for p in err.get("loc", ())]
        out.append({"field": ".".join(loc), "problem": str(err.get("msg", "invalid"))})
    return out


def allowed_methods(routes: Sequence[APIRoute], path: str) -> list[str]:
    """Every method of every route whose path matches ``path``, sorted."""
    methods: set[str] = set()
    for route in routes:
        if route.methods and route.path_regex.match(path):
            methods |= route.methods
    return sorted(methods)


def install(app: FastAPI, routes: Sequence[APIRoute]) -> None:
    """Install the handlers; ``routes`` are the app's routes (for a 405's Allow)."""

    @app.exception_handler(KeystrataError)
    async def _ours(_: Request, exc: KeystrataError) -> JSONResponse:
        if exc.status >= 500:
            log.warning("request failed: %s (%s)", exc.message, type(exc).__name__)
        return JSONResponse(error_body(exc.message, exc.details), status_code=exc.status)

    @app.exception_handler(RequestValidationError)
    async def _invalid(_: Request, exc: RequestValidationError) -> JSONResponse:
        details = _validation_details(exc)
        summary = "; ".join(f"{d['field']}: {d['problem']}" for d in details[:3])
        return JSONResponse(error_body(f"invalid request: {summary}", details), status_code=400)

    @app.exception_handler(HTTPException)
    async def _http(request: Request, exc: HTTPException) -> JSONResponse:
        message = exc.detail if isinstance(exc.detail, str) else "request refused"
        headers = dict(getattr(exc, "headers", None) or {})
        if exc.status_code == 405:
            # Starlette names the methods of the first route matching the path only;
            # RFC 9110 section 15.5.6 wants every method the target supports.
            headers["Allow"] = ", ".join(allowed_methods(routes, request.scope["path"]))
        return JSONResponse(error_body(message), status_code=exc.status_code, headers=headers)

    @app.exception_handler(Exception)
    async def _unexpected(_: Request, exc: Exception) -> JSONResponse:
        # Log the type and traceback; our own code never puts key material in exceptions.
        log.error("unexpected error: %s", type(exc).__name__, exc_info=exc)
        return JSONResponse(error_body("internal error"), status_code=500)
