"""Build the FastAPI application of one node from its context."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from cryptography import x509
from fastapi import APIRouter, FastAPI
from fastapi.routing import APIRoute

from keystrata import __version__
from keystrata.api import errors
from keystrata.api.limits import BodyLimit
from keystrata.api.routes import audit, etsi, health, links, node, pairs, peer, registry
from keystrata.observability.http import RequestMetrics, RequestTimer
from keystrata.services.context import NodeContext
from keystrata.workers.peer_client import PeerClient
from keystrata.workers.runner import Background

#: Bodies of routes other than ingest are small JSON documents.
DEFAULT_BODY_LIMIT = 1024 * 1024


ROUTERS: tuple[APIRouter, ...] = (
    node.router,
    registry.router,
    links.router,
    pairs.router,
    peer.router,
    etsi.router,
    audit.router,
    health.router,
)


def route_table() -> list[APIRoute]:
    """Every API route of a node, with its path and the roles it admits (for tests/docs)."""
    return [r for router in ROUTERS for r in router.routes if isinstance(r, APIRoute)]


def create_app(ctx: NodeContext) -> FastAPI:
    """Return the node's ASGI app; every route needs an authenticated caller."""

    @asynccontextmanager
    async def lifespan(_: FastAPI) -> AsyncIterator[None]:
        background = Background(ctx) if ctx.settings.server.background_work else None
        if background:
            background.start()
        try:
            yield
        finally:
            if background:
                background.stop()

    app = FastAPI(
        lifespan=lifespan,
        title=f"keystrata node {ctx.node_id}",
        version=__version__,
        docs_url=None,
        redoc_url=None,
    )
    app.state.ctx = ctx
    app.state.peers = PeerClient(ctx.settings)
    app.state.ca_cert = x509.load_pem_x509_certificate(ctx.settings.tls.ca.read_bytes())
    errors.install(app)
    for router in ROUTERS:
        app.include_router(router)
    app.add_middleware(
        BodyLimit,
        default=DEFAULT_BODY_LIMIT,
        large=ctx.settings.ingest.max_request_bytes,
        large_prefixes=("/api/v1/links/", "/api/v1/peer/"),
        as_400_prefixes=("/api/v1/keys/",),
    )
    # Added last, so outermost: it also times refusals from the body limit.
    app.state.request_metrics = RequestMetrics()
    app.add_middleware(RequestTimer, metrics=app.state.request_metrics)
    return app
