"""Build the FastAPI application of one node from its context and the parts the
composition root (:mod:`keystrata.server`) hands in: the delivery port to owning
stations and the background work to run during the app's lifespan."""

from __future__ import annotations

import asyncio
import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager, suppress
from typing import TYPE_CHECKING, Protocol

from cryptography import x509
from fastapi import APIRouter, FastAPI
from fastapi.routing import APIRoute
from starlette.concurrency import run_in_threadpool

from keystrata import __version__
from keystrata.api import errors
from keystrata.api.browsers import BrowserGuard
from keystrata.api.limits import BodyLimit
from keystrata.api.routes import (
    audit,
    dashboard,
    docs,
    etsi,
    health,
    holds,
    links,
    node,
    pairs,
    peer,
    plan,
    registry,
)
from keystrata.context import NodeContext
from keystrata.errors import KeystrataError
from keystrata.observability.http import RequestMetrics, RequestTimer, install_access_log_filter
from keystrata.registry import principals

if TYPE_CHECKING:
    from keystrata.delivery.ports import AllocationSource
    from keystrata.restore.points import ProgressSource

#: Bodies of routes other than ingest are small JSON documents.
DEFAULT_BODY_LIMIT = 1024 * 1024
#: Longest wait between two flushes of counted refusals (registry/principals.py).
REFUSAL_FLUSH_SECONDS = 10.0

log = logging.getLogger("keystrata.api")


ROUTERS: tuple[APIRouter, ...] = (
    node.router,
    registry.router,
    links.router,
    pairs.router,
    plan.router,
    holds.router,
    peer.router,
    etsi.router,
    audit.router,
    health.router,
    docs.router,
    dashboard.router,
)


class BackgroundWork(Protocol):
    """What runs beside the routes while the app lives (the node's loops)."""

    def start(self) -> None: ...
    def stop(self) -> None: ...


def route_table() -> list[APIRoute]:
    """Every API route of a node, with its path and the roles it admits (for tests/docs)."""
    return [r for router in ROUTERS for r in router.routes if isinstance(r, APIRoute)]


def create_app(
    ctx: NodeContext,
    *,
    allocation_source: AllocationSource | None = None,
    progress_source: ProgressSource | None = None,
    background: BackgroundWork | None = None,
) -> FastAPI:
    """Return the node's ASGI app; every route needs an authenticated caller.

    ``allocation_source`` is how Get key with key IDs asks an owning station for its
    pending allocations (None: it cannot, and an unknown key ID is a 503);
    ``progress_source`` how an operator's release of a held pair asks the partner for
    its consumption points (None: it cannot, 503).
    """

    @asynccontextmanager
    async def lifespan(_: FastAPI) -> AsyncIterator[None]:
        if background:
            background.start()
        flusher = asyncio.create_task(_flush_refusals(ctx))
        try:
            yield
        finally:
            flusher.cancel()
            with suppress(asyncio.CancelledError):
                await flusher
            if background:
                background.stop()
            await _flush_once(ctx, everything=True)

    app = FastAPI(
        lifespan=lifespan,
        title=f"keystrata node {ctx.node_id}",
        version=__version__,
        # The document is served by routes/docs.py, behind the identity dependency;
        # no interactive pages.
        openapi_url=None,
        docs_url=None,
        redoc_url=None,
    )
    app.state.ctx = ctx
    app.state.allocation_source = allocation_source
    app.state.progress_source = progress_source
    app.state.ca_cert = x509.load_pem_x509_certificate(ctx.settings.tls.ca.read_bytes())
    errors.install(app, route_table())
    for router in ROUTERS:
        app.include_router(router)
    app.add_middleware(
        BodyLimit,
        default=DEFAULT_BODY_LIMIT,
        large=ctx.settings.ingest.max_request_bytes,
        large_prefixes=("/api/v1/links/", "/api/v1/peer/"),
        as_400_prefixes=("/api/v1/keys/",),
    )
    app.add_middleware(BrowserGuard, ctx=ctx)  # before any route or body: browsers.py
    # Added last, so outermost: it also times refusals from the body limit.
    app.state.request_metrics = RequestMetrics()
    app.add_middleware(RequestTimer, metrics=app.state.request_metrics)
    install_access_log_filter()  # uvicorn's access log: route templates, not raw paths
    return app


async def _flush_refusals(ctx: NodeContext) -> None:
    """Write counted refusals whose interval is over, until cancelled."""
    interval = ctx.settings.ledger.refusal_interval_seconds
    while True:
        await asyncio.sleep(min(max(interval, 0.5), REFUSAL_FLUSH_SECONDS))
        await _flush_once(ctx)


async def _flush_once(ctx: NodeContext, *, everything: bool = False) -> None:
    try:
        await run_in_threadpool(principals.flush_refusals, ctx, everything=everything)
    except KeystrataError as exc:  # the ledger is unavailable: the counts wait
        log.warning("counted refusals not written yet: %s", exc.message)
