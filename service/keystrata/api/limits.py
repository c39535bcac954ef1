"""Request body limits, enforced while the body streams in (before any parsing)."""

from __future__ import annotations

import json
from typing import Any

from starlette.exceptions import HTTPException

Scope = dict[str, Any]


class BodyLimit:
    """ASGI middleware: refuse a body that exceeds the limit for its path: 413, or 400
    on ``as_400_prefixes`` (ETSI GS QKD 014 routes know only 400, 401 and 503)."""

    def __init__(
        self,
        app: Any,
        *,
        default: int,
        large: int,
        large_prefixes: tuple[str, ...],
        as_400_prefixes: tuple[str, ...] = (),
    ):
        self.app = app
        self.default = default
        self.large = large
        self.large_prefixes = large_prefixes
        self.as_400_prefixes = as_400_prefixes

    async def __call__(self, scope: Scope, receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        path: str = scope.get("path", "")
        limit = self.large if path.startswith(self.large_prefixes) else self.default
        status = 400 if path.startswith(self.as_400_prefixes) else 413
        for name, value in scope.get("headers", ()):
            if name == b"content-length":
                try:
                    declared = int(value)
                except ValueError:
                    declared = limit + 1
                if declared > limit:
                    await _too_large(send, limit, status)
                    return
        seen = 0
        started = False

        async def limited_receive() -> Any:
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > limit:
                    raise _BodyTooLarge(status)
            return message

        async def tracking_send(message: Any) -> None:
            nonlocal started
            if message["type"] == "http.response.start":
                started = True
            await send(message)

        try:
            await self.app(scope, limited_receive, tracking_send)
        except _BodyTooLarge:
            if not started:
                await _too_large(send, limit, status)


class _BodyTooLarge(HTTPException):
    """Raised from ``receive``; an HTTPException so that the framework's body reading
    passes it on (as 413) instead of turning it into a parse error."""

    def __init__(self, status: int = 413) -> None:
        super().__init__(status_code=status, detail="request body too large")


async def _too_large(send: Any, limit: int, status: int) -> None:
    body = json.dumps({"message": f"request body larger than {limit} bytes"}).encode()
    await send(
        {
            "type": "http.response.start",
            "status": status,
            "headers": [
                (b"content-type", b"application/json"),
                (b"content-length", str(len(body)).encode()),
            ],
        }
    )
    await send({"type": "http.response.body", "body": body})
