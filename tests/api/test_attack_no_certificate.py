"""A TLS client without a client certificate: the handshake completes, so the caller is
told in an HTTP answer what it lacks (401 with a hint), and nothing else changes.

Written from the attacker's side first:

* a client that presents no certificate must not be able to slip one in another way:
  with proxy mode on (``[server] proxy_client_cert_header``), a certificate in that
  header on a TLS connection without a client certificate is checked against the
  network's CA like any proxied one; a forged SAE certificate of another CA is refused
  (it was accepted, unchecked, once a handshake without a certificate could complete);
* a certificate that does not verify still fails the handshake (another CA), so only
  "no certificate at all" reaches the app, and only it gets the hint: an unknown or
  wrong certificate keeps the one ``{"message": "unauthorized"}`` for every reason.

The handshakes are real (the node's own server context, in memory, tests/tlskit.py) and
the ASGI TLS extension is the one ``api/tls.py`` builds from the server's end of them.
"""

from __future__ import annotations

import dataclasses
import ssl
from collections.abc import Iterator
from pathlib import Path
from typing import Any
from urllib.parse import quote

import httpx
import pytest
from anyio.from_thread import BlockingPortal, start_blocking_portal

from conftest import Node
from helpers import ledger_events
from keystrata.api.identity import NO_CERTIFICATE
from keystrata.api.tls import tls_extension
from keystrata.crypto.tls import server_context
from keystrata.loopback.pki import PkiFiles, make_pki
from tlskit import client_context, handshake


def _anonymous_client(ca: Path) -> ssl.SSLContext:
    context = ssl.SSLContext(ssl.PROTOCOL_TLS_CLIENT)
    context.load_verify_locations(ca)
    return context


def _extension(node: Node, client: ssl.SSLContext) -> dict[str, Any]:
    """The TLS extension of a connection that ``client`` opened to ``node``'s server
    context (a real handshake in memory)."""
    server = server_context(node.ctx.settings.tls)
    return tls_extension(handshake(client, server, "127.0.0.1"))


class _Connection:
    """ASGI stand-in for uvicorn with keystrata's protocol: every request of the
    connection carries that connection's TLS extension."""

    def __init__(self, app: Any, extension: dict[str, Any]) -> None:
        self.app, self.extension = app, extension

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        if scope["type"] == "http":
            scope["extensions"] = {**(scope.get("extensions") or {}), "tls": self.extension}
        await self.app(scope, receive, send)


@pytest.fixture
def portal() -> Iterator[BlockingPortal]:
    with start_blocking_portal() as p:
        yield p


def _get(
    portal: BlockingPortal, app: Any, path: str, headers: dict[str, str] | None = None
) -> httpx.Response:
    async def call() -> httpx.Response:
        async with httpx.AsyncClient(
            transport=httpx.ASGITransport(app=app), base_url="https://testserver"
        ) as client:
            return await client.get(path, headers=headers or {})

    return portal.call(call)


def test_the_handshake_completes_without_a_certificate_and_fails_with_a_bad_one(
    station: Node, pki: PkiFiles
) -> None:
    anonymous = _extension(station, _anonymous_client(pki.ca))
    assert anonymous["client_cert_chain"] == []
    assert anonymous["tls_version"] in (0x0303, 0x0304)
    # A certificate of another CA (same subject as our operator) is refused in the
    # handshake itself, as before: presenting one means it must verify.
    foreign = client_context(
        pki.ca, pki.foreign_dir / "ops-ada.crt", pki.foreign_dir / "ops-ada.key"
    )
    with pytest.raises(ssl.SSLError):
        _extension(station, foreign)
    ours = client_context(pki.ca, pki.cert("ops-ada"), pki.key("ops-ada"))
    assert len(_extension(station, ours)["client_cert_chain"]) == 1


def test_no_certificate_gets_401_with_the_hint_and_a_ledger_entry(
    station: Node, pki: PkiFiles, portal: BlockingPortal
) -> None:
    from keystrata.server import compose

    app = compose(station.ctx)
    before = len(ledger_events(station.ctx))
    anonymous = _Connection(app, _extension(station, _anonymous_client(pki.ca)))
    for path in ("/api/v1/node", "/api/v1/keys/sae-c1/status", "/api/v1/metrics", "/docs"):
        r = _get(portal, anonymous, path)
        assert r.status_code == 401, (path, r.text)
        assert r.json() == {"message": NO_CERTIFICATE}, path
    assert "client certificate" in NO_CERTIFICATE and "network's CA" in NO_CERTIFICATE
    assert NO_CERTIFICATE.startswith("unauthorized")
    assert ledger_events(station.ctx)[before:].count("auth.refused") >= 1
    # A certificate of our CA that no principal has: the one answer, no hint.
    stranger = client_context(pki.ca, pki.cert("stranger"), pki.key("stranger"))
    r = _get(portal, _Connection(app, _extension(station, stranger)), "/api/v1/node")
    assert r.status_code == 401 and r.json() == {"message": "unauthorized"}


def test_a_certificate_in_the_proxy_header_of_a_connection_without_one_is_checked(
    station: Node, pki: PkiFiles, portal: BlockingPortal, tmp_path: Path
) -> None:
    """Attacker: reaches the node directly over TLS without a certificate, where the
    node runs in proxy mode, and puts a certificate of its own CA naming SAE sae-a1 (SAE
    certificates are not pinned) into the proxy's header."""
    from keystrata.server import compose

    settings = station.ctx.settings
    proxied = settings.model_copy(
        update={
            "server": settings.server.model_copy(
                update={"proxy_client_cert_header": "x-client-cert"}
            )
        }
    )
    app = compose(dataclasses.replace(station.ctx, settings=proxied))
    anonymous = _Connection(app, _extension(station, _anonymous_client(pki.ca)))
    forger = make_pki(tmp_path / "forger", "Forger CA", (), {"sae-a1": "sae"})
    forged = {"x-client-cert": quote(forger.pem("sae-a1"))}
    before = len(ledger_events(station.ctx))
    r = _get(portal, anonymous, "/api/v1/node", forged)
    assert r.status_code == 401, r.text
    assert r.json() == {"message": "unauthorized"}
    assert ledger_events(station.ctx)[before:] == ["auth.refused"]
    r = _get(portal, anonymous, "/api/v1/keys/sae-c1/status", forged)
    assert r.status_code == 401, r.text
    # Control: the header of a real proxy (a certificate of the network's CA) is taken.
    genuine = {"x-client-cert": quote(pki.pem("sae-a1"))}
    assert _get(portal, anonymous, "/api/v1/node", genuine).status_code == 200
