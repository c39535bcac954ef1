"""Identity is one dependency: routes ask for a :class:`Caller` with a role they admit.

The client certificate comes from the ASGI TLS extension that keystrata's own uvicorn
protocol puts into every request scope (see :mod:`keystrata.api.tls`), or, only when a
TLS-terminating proxy mode is configured, from a header the proxy sets. In proxy mode
the certificate is checked against the CA here, since no TLS layer of ours did it.
"""

from __future__ import annotations

from collections.abc import Callable
from functools import lru_cache
from pathlib import Path
from typing import Any
from urllib.parse import unquote

from cryptography import x509
from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import hashes
from cryptography.x509.oid import NameOID
from fastapi import Request

from keystrata.context import NodeContext
from keystrata.crypto.certificates import carries_node_marker
from keystrata.crypto.revocation import CrlWatch
from keystrata.errors import Forbidden, InvalidInput, Unauthenticated
from keystrata.registry import principals
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole

#: The answer to a caller that presented no certificate at all (the TLS handshake lets
#: it through so that it can be told): the one 401, with what to do. A caller whose
#: certificate is unknown, retired or wrong gets the plain ``unauthorized`` (no oracle);
#: one without a certificate learns nothing it did not know.
NO_CERTIFICATE = (
    "unauthorized: no client certificate was presented; "
    "connect with a certificate issued by the network's CA"
)


@lru_cache(maxsize=4096)
def _parse(pem: str) -> tuple[str, str, x509.Certificate] | None:
    try:
        cert = x509.load_pem_x509_certificate(pem.encode())
    except ValueError:
        return None
    names = cert.subject.get_attributes_for_oid(NameOID.COMMON_NAME)
    if len(names) != 1:
        return None
    cn = names[0].value
    cn = cn if isinstance(cn, str) else cn.decode()
    return cn, cert.fingerprint(hashes.SHA256()).hex(), cert


def _handshake_certificate(request: Request) -> str | None:
    """The leaf certificate our TLS layer verified in the handshake, if any."""
    tls = request.scope.get("extensions", {}).get("tls")
    if tls and tls.get("client_cert_chain"):
        return str(tls["client_cert_chain"][0])
    return None


def client_certificate_pem(request: Request, proxy_header: str | None) -> str | None:
    """Return the leaf client certificate (PEM) of the request, or None."""
    verified = _handshake_certificate(request)
    if verified is not None:
        return verified
    if proxy_header:
        value = request.headers.get(proxy_header)
        if value:
            return unquote(value)
    return None


def _verify_from_proxy(cert: x509.Certificate, ca: x509.Certificate, now: Any) -> bool:
    try:
        cert.verify_directly_issued_by(ca)
    except (ValueError, TypeError, InvalidSignature):
        return False
    return bool(cert.not_valid_before_utc <= now <= cert.not_valid_after_utc)


def _revoked(ctx: NodeContext, cert: x509.Certificate) -> str | None:
    """The refusal reason if ``[tls] crl`` lists the certificate (or cannot be read)."""
    tls = ctx.settings.tls
    if tls.crl is None:
        return None
    try:
        return "certificate_revoked" if _crl_watch(tls.crl, tls.ca).revoked(cert) else None
    except (OSError, InvalidInput):
        return "revocation_list_unreadable"  # fail closed


@lru_cache(maxsize=8)
def _crl_watch(crl: Path, ca: Path) -> CrlWatch:
    return CrlWatch(crl, ca)


def admit(*roles: PrincipalRole, hide_role: bool = False) -> Callable[[Request], Caller]:
    """Return a dependency that yields the caller if its role is one of ``roles``.

    The returned function carries ``roles`` (and ``refusal_status``) as attributes so
    that tests and docs can read each route's admitted roles from the app's route table.
    ``hide_role`` answers a role the route does not admit with 401 instead of 403.

    Raises (from the dependency):
        Unauthenticated: no certificate, or one that maps to no active principal (401,
            the same answer for every reason but one: a caller that presented no
            certificate at all is told to present one, ``NO_CERTIFICATE``).
        Forbidden: a known principal whose role this route does not admit (403).
    """

    def dependency(request: Request) -> Caller:
        ctx: NodeContext = request.app.state.ctx
        proxy = ctx.settings.server.proxy_client_cert_header
        pem = client_certificate_pem(request, proxy)
        parsed = _parse(pem) if pem else None
        method, path = request.method, request.url.path
        # The template of the matched route (never the raw path, which may hold a key).
        route = getattr(request.scope.get("route"), "path", None)
        if parsed is None:
            principals.record_refusal(
                ctx,
                reason="no_certificate",
                subject=None,
                principal_id=None,
                method=method,
                route=route,
                path=path,
            )
            raise Unauthenticated(NO_CERTIFICATE if pem is None else None)
        subject, sha256, cert = parsed
        # Only a certificate of the handshake was verified by our TLS layer; one from
        # the proxy's header is checked here, also on a TLS connection without one.
        from_proxy = _handshake_certificate(request) is None
        if from_proxy and not _verify_from_proxy(cert, request.app.state.ca_cert, ctx.clock.now()):
            principals.record_refusal(
                ctx,
                reason="certificate_not_from_ca",
                subject=subject,
                principal_id=None,
                method=method,
                route=route,
                path=path,
            )
            raise Unauthenticated()
        revoked = _revoked(ctx, cert)
        if revoked is not None:
            principals.record_refusal(
                ctx,
                reason=revoked,
                subject=subject,
                principal_id=None,
                method=method,
                route=route,
                path=path,
            )
            raise Unauthenticated()
        caller = principals.resolve(ctx, subject, sha256)
        if caller is not None and (caller.role is PrincipalRole.PEER) != carries_node_marker(cert):
            # Only a node certificate (with the node marker) speaks as a peer, and a node
            # certificate is nothing else: a stolen node key never becomes an operator.
            principals.record_refusal(
                ctx,
                reason="peer_needs_node_certificate"
                if caller.role is PrincipalRole.PEER
                else "node_certificate_not_a_peer",
                subject=subject,
                principal_id=caller.principal_id,
                method=method,
                route=route,
                path=path,
            )
            raise Unauthenticated()
        if caller is None:
            principals.record_refusal(
                ctx,
                reason="unknown_certificate",
                subject=subject,
                principal_id=None,
                method=method,
                route=route,
                path=path,
            )
            raise Unauthenticated()
        if caller.role not in roles:
            principals.record_refusal(
                ctx,
                reason="role_not_admitted",
                subject=subject,
                principal_id=caller.principal_id,
                method=method,
                route=route,
                path=path,
            )
            # ETSI GS QKD 014 knows no 403: its routes answer every refusal with 401.
            raise Unauthenticated() if hide_role else Forbidden()
        request.state.caller = caller
        return caller

    dependency.roles = frozenset(roles)  # type: ignore[attr-defined]
    dependency.refusal_status = 401 if hide_role else 403  # type: ignore[attr-defined]
    return dependency
