"""One handler turns every error into the JSON error object ``{"message", "details"}``
(the shape ETSI GS QKD 014 uses for its error object), without echoing any input value:
a rejected value might be key material."""

from __future__ import annotations

import logging
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException

from keystrata.errors import KeystrataError

log = logging.getLogger("keystrata.api")


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


def install(app: FastAPI) -> None:
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
    async def _http(_: Request, exc: HTTPException) -> JSONResponse:
        message = exc.detail if isinstance(exc.detail, str) else "request refused"
        return JSONResponse(
            error_body(message), status_code=exc.status_code, headers=getattr(exc, "headers", None)
        )

    @app.exception_handler(Exception)
    async def _unexpected(_: Request, exc: Exception) -> JSONResponse:
        # Log the type and traceback; our own code never puts key material in exceptions.
        log.error("unexpected error: %s", type(exc).__name__, exc_info=exc)
        return JSONResponse(error_body("internal error"), status_code=500)
