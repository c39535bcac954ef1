"""Put the client certificate into every request scope (ASGI TLS extension).

uvicorn verifies the client certificate during the handshake (``CERT_REQUIRED`` against
the network CA) but does not pass it to the application. This subclass of uvicorn's
httptools protocol reads the peer certificate when the connection is made and wraps the
application so that each request scope of that connection carries
``scope["extensions"]["tls"]`` as the ASGI TLS extension describes it
(``client_cert_chain``: PEM strings, leaf first; Python's ``ssl`` exposes only the leaf).
"""

from __future__ import annotations

import asyncio
import ssl
from typing import Any

from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol

_TLS_VERSIONS = {"TLSv1.2": 0x0303, "TLSv1.3": 0x0304}


def tls_extension(ssl_object: ssl.SSLObject) -> dict[str, Any]:
    """Build the ASGI TLS extension dict for one connection."""
    der = ssl_object.getpeercert(binary_form=True)
    chain = [ssl.DER_cert_to_PEM_cert(der)] if der else []
    cipher = ssl_object.cipher()
    return {
        "server_cert": None,
        "client_cert_chain": chain,
        "client_cert_name": None,
        "client_cert_error": None,
        "tls_version": _TLS_VERSIONS.get(ssl_object.version() or ""),
        "cipher_suite": None if cipher is None else cipher[0],
    }


class ClientCertHttpToolsProtocol(HttpToolsProtocol):
    """uvicorn HTTP protocol that exposes the verified client certificate to the app."""

    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        super().connection_made(transport)
        ssl_object = transport.get_extra_info("ssl_object")
        if ssl_object is None:
            return
        extension = tls_extension(ssl_object)
        inner = self.app

        async def app_with_tls(scope: Any, receive: Any, send: Any) -> None:
            if scope["type"] in ("http", "websocket"):
                scope["extensions"] = {**(scope.get("extensions") or {}), "tls": extension}
            await inner(scope, receive, send)

        self.app = app_with_tls
