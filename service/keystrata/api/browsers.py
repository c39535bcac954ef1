"""Requests from web browsers: the dashboard's cross-origin reads, and nothing else.

An operator who opens the dashboard imports a client certificate into a browser, and a
browser presents it to this node for any page that makes a request here, including a
page of some other site (a link, a form, an image). So a request a browser marks as
coming from another origin (the ``Origin`` header, or ``Sec-Fetch-Site`` other than
``same-origin``/``none``; Fetch Standard, section 3.1 and the Fetch Metadata Request
Headers draft) is refused before it reaches a route, unless it is

- a top-level navigation (``Sec-Fetch-Mode: navigate``) to a dashboard page, which
  changes nothing and whose answer only the browser's own tab shows; or
- a GET of the dashboard's JSON (``/api/v1/dashboard/...``) from the origin of another
  node of this node's registry (observability/dashboard.allowed_origins): the network
  page a node serves reads every other node's overview with the operator's own
  certificate. Those answers carry ``Access-Control-Allow-Origin`` (that origin),
  ``Access-Control-Allow-Credentials: true`` and ``Vary: Origin`` (Fetch Standard,
  section 3.2, CORS protocol), so the browser hands them to that page.

The network page asks only with simple GETs (no custom header), so a browser sends no
CORS preflight, which would come without a client certificate. Clients that are not
browsers send neither header and are not affected. A refusal is 403 (401
``unauthorized`` on the ETSI GS QKD 014 routes, which know no 403) and an
``auth.refused`` ledger entry with reason ``cross_origin_request``.
"""

from __future__ import annotations

import json
import logging

from starlette.concurrency import run_in_threadpool
from starlette.datastructures import Headers, MutableHeaders
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from keystrata.context import NodeContext
from keystrata.errors import KeystrataError
from keystrata.observability import dashboard
from keystrata.registry import principals

log = logging.getLogger("keystrata.api")

#: The dashboard's pages, which a navigation from another origin may open.
PAGES = frozenset({"/dashboard", "/dashboard/network"})
#: The dashboard's JSON, which pages of the other nodes' origins may read.
SHARED_PREFIX = "/api/v1/dashboard/"
REFUSED = "cross-origin request refused: this node answers other origins' pages only " + (
    "for the dashboard of a node in its registry"
)


class BrowserGuard:
    """ASGI middleware applying the rules above."""

    def __init__(self, app: ASGIApp, ctx: NodeContext) -> None:
        self.app = app
        self.ctx = ctx

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = Headers(scope=scope)
        origin, site = headers.get("origin"), headers.get("sec-fetch-site")
        if origin is None and site is None:
            await self.app(scope, receive, send)
            return
        own = "https://" + headers.get("host", "")
        path, method = scope["path"], scope["method"]
        if site in (None, "same-origin", "none") and origin in (None, own):
            await self.app(scope, receive, send)
            return
        if method == "GET" and path in PAGES and headers.get("sec-fetch-mode") == "navigate":
            await self.app(scope, receive, send)
            return
        if method == "GET" and path.startswith(SHARED_PREFIX) and origin is not None:
            allowed = await run_in_threadpool(self._allowed)
            if origin in allowed:
                await self.app(scope, receive, _with_cors(send, origin))
                return
        await self._refuse(scope, send, path, method)

    def _allowed(self) -> frozenset[str]:
        try:
            return dashboard.allowed_origins(self.ctx)
        except KeystrataError:
            return frozenset()  # the registry cannot be read: no other origin is known

    async def _refuse(self, scope: Scope, send: Send, path: str, method: str) -> None:
        try:
            await run_in_threadpool(
                lambda: principals.record_refusal(
                    self.ctx,
                    reason="cross_origin_request",
                    subject=None,
                    principal_id=None,
                    method=method,
                    path=path,
                )
            )
        except KeystrataError as exc:  # the ledger is unavailable: refuse all the same
            log.warning("cross-origin refusal not recorded: %s", exc.message)
        etsi = path.startswith("/api/v1/keys/")
        status, body = (401, {"message": "unauthorized"}) if etsi else (403, {"message": REFUSED})
        raw = json.dumps(body).encode()
        await send(
            {
                "type": "http.response.start",
                "status": status,
                "headers": [
                    (b"content-type", b"application/json"),
                    (b"content-length", str(len(raw)).encode()),
                ],
            }
        )
        await send({"type": "http.response.body", "body": raw})


def _with_cors(send: Send, origin: str) -> Send:
    async def sending(message: Message) -> None:
        if message["type"] == "http.response.start":
            headers = MutableHeaders(scope=message)
            headers["access-control-allow-origin"] = origin
            headers["access-control-allow-credentials"] = "true"
            headers.append("vary", "Origin")
        await send(message)

    return sending
