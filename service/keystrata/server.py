"""Run a node: start-up checks, then uvicorn over HTTPS with required client certificates."""

from __future__ import annotations

import logging
import os
import ssl

import uvicorn
from fastapi import FastAPI

from keystrata.api.app import create_app
from keystrata.api.tls import ClientCertHttpToolsProtocol
from keystrata.config import CONFIG_ENV, Settings, load_settings
from keystrata.errors import ConfigError
from keystrata.services.node import open_node
from keystrata.storage.db import Database

log = logging.getLogger("keystrata.server")


def build_app(settings: Settings) -> FastAPI:
    """Open the node (every start-up check) and return its app.

    Raises:
        StartupRefused / ConfigError: the node must not serve.
    """
    db = Database.from_url(
        settings.database.url,
        sqlite_synchronous=settings.database.sqlite_synchronous,
        pool_size=settings.database.pool_size,
    )
    ctx = open_node(settings, db)
    return create_app(ctx)


def app_factory() -> FastAPI:
    """Entry point for uvicorn worker processes; the config path comes from the parent."""
    return build_app(load_settings(os.environ[CONFIG_ENV]))


def serve(settings: Settings, config_path: str) -> None:
    """Check the node once in this process, then serve until interrupted."""
    for path, what in (
        (settings.tls.cert, "certificate"),
        (settings.tls.key, "private key"),
        (settings.tls.ca, "CA certificate"),
    ):
        if not path.is_file():
            raise ConfigError(f"setting tls: {what} file {path} does not exist")
    build_app(settings)  # refuse to start here, with a clear message, not in each worker
    os.environ[CONFIG_ENV] = config_path
    uvicorn.run(
        "keystrata.server:app_factory",
        factory=True,
        host=settings.server.host,
        port=settings.server.port,
        workers=settings.server.workers,
        http=ClientCertHttpToolsProtocol,
        ssl_certfile=str(settings.tls.cert),
        ssl_keyfile=str(settings.tls.key),
        ssl_ca_certs=str(settings.tls.ca),
        ssl_cert_reqs=ssl.CERT_REQUIRED,
        log_level="info",
        proxy_headers=False,
        server_header=False,
        timeout_graceful_shutdown=2,
        timeout_keep_alive=settings.server.keep_alive_seconds,
    )
