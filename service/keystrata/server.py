"""Run a node: start-up checks, the composition root, then uvicorn over HTTPS with
client certificates (a handshake without one completes, so the caller gets a 401 that
says what is missing; one that does not verify fails the handshake).

The composition root (:func:`compose`) is the one place where a process's parts meet:
the node's context, one peer client for the process (shared by the background loops and
by key delivery's port to owning stations), the loops, and the app.
"""

# ruff: noqa: E402 (the imports after SERVER_LEAVES_OUT must come after it)
from __future__ import annotations

import sys

#: Optional parts of libraries this process never runs, kept out of its memory. Each
#: library imports them inside ``try: ... except ImportError`` and does without them;
#: ``None`` in ``sys.modules`` makes such an import fail (the import system's rule):
#: - ``httpx._main``: httpx's own command line, which brings click, rich and pygments
#:   (about 6 MiB) whenever they are installed, as ours are for ``keystrata``'s CLI;
#: - ``uvicorn.supervisors.watchfilesreload``: uvicorn's ``--reload`` supervisor, never
#:   used by a node (it falls back to its plain stat reloader), and watchfiles with it.
SERVER_LEAVES_OUT = ("httpx._main", "uvicorn.supervisors.watchfilesreload")
for _name in SERVER_LEAVES_OUT:
    sys.modules.setdefault(_name, None)  # type: ignore[arg-type]

import logging
import os
import signal
import ssl
import threading
import time
from collections.abc import Callable
from datetime import UTC, datetime

import uvicorn
from fastapi import FastAPI

from keystrata.api.app import create_app
from keystrata.api.tls import ClientCertHttpToolsProtocol
from keystrata.config import CONFIG_ENV, PARENT_ENV, Settings, load_settings
from keystrata.context import NodeContext
from keystrata.crypto import tls
from keystrata.crypto.certificates import load_certificate
from keystrata.crypto.revocation import read_crl
from keystrata.errors import ConfigError, InvalidInput
from keystrata.node.lifecycle import open_node
from keystrata.node.loops import Background
from keystrata.peering.client import PeerClient
from keystrata.storage.db import Database

log = logging.getLogger("keystrata.server")


def _database(settings: Settings) -> Database:
    return Database.from_url(
        settings.database.url,
        sqlite_synchronous=settings.database.sqlite_synchronous,
        pool_size=settings.database.pool_size,
    )


def build_app(settings: Settings) -> FastAPI:
    """Open the node (every start-up check) and return its app.

    Raises:
        StartupRefused / ConfigError: the node must not serve.
    """
    return compose(open_node(settings, _database(settings)))


class _ProcessWork:
    """The loops of this process (when the node runs background work), then its peer
    client closed, in the app's lifespan."""

    def __init__(self, loops: Background | None, peers: PeerClient) -> None:
        self.loops = loops
        self.peers = peers

    def start(self) -> None:
        if self.loops is not None:
            self.loops.start()

    def stop(self) -> None:
        if self.loops is not None:
            self.loops.stop()
        self.peers.close()


def compose(ctx: NodeContext, peers: PeerClient | None = None) -> FastAPI:
    """Wire one process: its peer client (``peers``, or a new one), its background
    loops and its app."""
    peers = peers or PeerClient(ctx.settings)
    loops = Background(ctx, peers) if ctx.settings.server.background_work else None
    return create_app(
        ctx,
        allocation_source=peers,
        progress_source=peers,
        background=_ProcessWork(loops, peers),
    )


def app_factory() -> FastAPI:
    """Entry point for uvicorn worker processes; the config path comes from the parent."""
    return build_app(load_settings(os.environ[CONFIG_ENV]))


def ssl_context_factory(config: object, default: Callable[[], ssl.SSLContext]) -> ssl.SSLContext:
    """uvicorn's hook, run in each worker process: our server context, not uvicorn's
    (TLS policy, CRL checked at each handshake and reloaded when the file changes)."""
    return tls.server_context(load_settings(os.environ[CONFIG_ENV]).tls)


def _check_crl(settings: Settings) -> None:
    crl = settings.tls.crl
    if crl is None:
        return
    try:
        parsed = read_crl(crl.read_bytes(), load_certificate(settings.tls.ca.read_bytes()))
    except InvalidInput as exc:
        raise ConfigError(f"setting tls.crl: {crl}: {exc.message}") from exc
    next_update = parsed.next_update_utc
    if next_update is not None and next_update <= datetime.now(UTC):
        raise ConfigError(
            f"setting tls.crl: {crl} passed its next update ({next_update.isoformat()}); "
            "issue a fresh one with `keystrata pki crl`, or every handshake would fail"
        )


def _stop_with_parent(value: str) -> None:
    """With ``KEYSTRATA_STOP_WITH_PARENT`` set to a process ID, watch that process stay
    this one's parent; when it is gone (this process was handed to another), stop as a
    SIGTERM stops: uvicorn drains and, with several workers, stops them too."""
    try:
        parent = int(value)
    except ValueError:
        raise ConfigError(f"{PARENT_ENV} must be a process ID") from None

    def watch() -> None:
        while os.getppid() == parent:
            time.sleep(0.5)
        log.warning("its parent process is gone; stopping")
        os.kill(os.getpid(), signal.SIGTERM)

    threading.Thread(target=watch, name="keystrata-parent-watch", daemon=True).start()


def serve(settings: Settings, config_path: str) -> None:
    """Check the node once in this process, then serve until interrupted."""
    parent = os.environ.pop(PARENT_ENV, None)  # the supervisor only, not its workers
    if parent is not None:
        _stop_with_parent(parent)
    for path, what in (
        (settings.tls.cert, "certificate"),
        (settings.tls.key, "private key"),
        (settings.tls.ca, "CA certificate"),
        (settings.tls.crl, "revocation list"),
    ):
        if path is not None and not path.is_file():
            raise ConfigError(f"setting tls: {what} file {path} does not exist")
    _check_crl(settings)
    try:
        tls.server_context(settings.tls)
    except (OSError, ssl.SSLError, InvalidInput) as exc:
        raise ConfigError(f"setting tls: the server's TLS context cannot be built: {exc}") from exc
    # Refuse to start here, with a clear message, not in each worker. One worker serves
    # in this process, with this very app; several build their own (app_factory), and
    # this process, their supervisor, keeps no database connection or peer client.
    db, peers = _database(settings), PeerClient(settings)
    app = compose(open_node(settings, db), peers)
    os.environ[CONFIG_ENV] = config_path
    if settings.server.workers > 1:
        peers.close()
        db.dispose()
    uvicorn.run(
        app if settings.server.workers == 1 else "keystrata.server:app_factory",
        factory=settings.server.workers > 1,
        host=settings.server.host,
        port=settings.server.port,
        workers=settings.server.workers,
        http=ClientCertHttpToolsProtocol,
        ssl_certfile=str(settings.tls.cert),
        ssl_keyfile=str(settings.tls.key),
        ssl_ca_certs=str(settings.tls.ca),
        ssl_cert_reqs=ssl.CERT_OPTIONAL,  # as crypto/tls.server_context builds it
        ssl_context_factory=ssl_context_factory,
        log_level="info",
        proxy_headers=False,
        server_header=False,
        timeout_graceful_shutdown=2,
        timeout_keep_alive=settings.server.keep_alive_seconds,
    )
