"""The TLS contexts a node builds: its server, and its client towards each peer.

Policy, the same on every context we build (and in the SDK, ``keystrata_client._tls``):

* TLS 1.2 is the floor (RFC 8996 deprecates 1.0 and 1.1);
* TLS 1.2 suites: ECDHE key exchange with AES-GCM or ChaCha20-Poly1305 only (the AEAD
  suites of RFC 5289 and RFC 7905; forward secrecy, no CBC, no RSA key transport);
  TLS 1.3 suites are OpenSSL's defaults, all AEAD (RFC 8446 section 9.1);
* no session tickets or resumption on the server: a resumed session skips the
  certificate check, so a certificate revoked since would still get in.

Server: a client certificate is asked for and, when one is presented, must verify
against the network CA (and, with ``[tls] crl``, not be listed in the CRL:
``VERIFY_CRL_CHECK_LEAF``), or the handshake fails. A client that presents none still
completes the handshake (``CERT_OPTIONAL``), so that it gets an HTTP answer saying what
it lacks (401 from the identity dependency, which admits no caller without a
certificate) instead of a connection closed without a word. A new CRL file is picked up
without restart: the server context's ``sni_callback`` (which OpenSSL calls on every
ClientHello, with or without a server name) swaps the connection's context for one
built with the newest CRL that verified.

Peer client: besides the CA chain and the host name of the URL, the certificate the
peer presents must carry the node marker and name, as its common name, the node ID of
the ``[[peers]]`` entry: a valid certificate of another node at that URL is refused
before anything is sent.
"""

from __future__ import annotations

import logging
import ssl
import tempfile
import threading
from typing import Any

from cryptography import x509
from cryptography.x509.oid import NameOID

from keystrata.config import TlsSection
from keystrata.crypto.certificates import carries_node_marker
from keystrata.crypto.revocation import CrlWatch

log = logging.getLogger("keystrata.tls")

#: OpenSSL cipher list for TLS 1.2 (it does not touch the TLS 1.3 suites).
TLS12_CIPHERS = "ECDHE+AESGCM:ECDHE+CHACHA20:!aNULL:!eNULL"


def apply_policy(context: ssl.SSLContext) -> ssl.SSLContext:
    """Set the protocol floor and the TLS 1.2 cipher list on ``context``; return it."""
    context.minimum_version = ssl.TLSVersion.TLSv1_2
    context.set_ciphers(TLS12_CIPHERS)
    context.options |= ssl.OP_NO_COMPRESSION
    return context


def _server_base(tls: TlsSection, crl_pem: bytes | None) -> ssl.SSLContext:
    context = apply_policy(ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER))
    # OpenSSL's SSL_VERIFY_PEER without FAIL_IF_NO_PEER_CERT: a certificate presented is
    # verified and a bad one ends the handshake; none at all is left to the app to refuse.
    context.verify_mode = ssl.CERT_OPTIONAL
    context.options |= ssl.OP_NO_TICKET
    context.num_tickets = 0  # TLS 1.3: no tickets, so no resumption
    context.load_cert_chain(str(tls.cert), str(tls.key))
    context.load_verify_locations(cafile=str(tls.ca))
    if crl_pem is not None:
        # Python's cadata takes certificates only; a file may hold CRLs too (OpenSSL's
        # X509_load_cert_crl_file). The bytes loaded are those CrlWatch verified.
        with tempfile.NamedTemporaryFile(prefix="keystrata-crl-", suffix=".pem") as tmp:
            tmp.write(crl_pem)
            tmp.flush()
            context.load_verify_locations(cafile=tmp.name)
        context.verify_flags |= ssl.VERIFY_CRL_CHECK_LEAF
    return context


class _Swapper:
    """The sni_callback that keeps each handshake on the newest CRL."""

    def __init__(self, tls: TlsSection, watch: CrlWatch, base: ssl.SSLContext) -> None:
        self._tls = tls
        self._watch = watch
        self._lock = threading.Lock()
        self._pem = watch.current()
        self._context = base
        self.swaps = 0

    def context(self) -> ssl.SSLContext:
        pem = self._watch.current()
        with self._lock:
            if pem is not None and pem != self._pem:
                try:
                    self._context = _server_base(self._tls, pem)
                except (OSError, ssl.SSLError) as exc:
                    log.error("TLS context with the new revocation list failed: %s", exc)
                else:
                    self._pem = pem
                    log.info("TLS: new revocation list in force for new connections")
            return self._context

    def __call__(self, ssl_object: Any, server_name: str | None, initial: Any) -> None:
        current = self.context()
        if ssl_object.context is not current:
            ssl_object.context = current
            self.swaps += 1


def server_context(tls: TlsSection) -> ssl.SSLContext:
    """Return the node's server context (see the module's docstring).

    Raises OSError or ssl.SSLError for unusable files, InvalidInput when ``[tls] crl``
    is set and no CRL of this CA can be read from it.
    """
    if tls.crl is None:
        return _server_base(tls, None)
    watch = CrlWatch(tls.crl, tls.ca)
    pem = watch.current()
    if pem is None:
        from keystrata.errors import InvalidInput

        raise InvalidInput(f"{tls.crl} holds no revocation list signed by the network CA")
    base = _server_base(tls, pem)
    swapper = _Swapper(tls, watch, base)
    # The callback is set on the first context only: connections start there, and the
    # context swapped in (with the same certificate and CA) needs no callback.
    base.sni_callback = swapper
    return base


class PeerIdentityError(ssl.SSLCertVerificationError):
    """The peer's certificate verified but is not the node we meant to reach."""


def _check_peer(der: bytes | None, node_id: str) -> None:
    if not der:
        raise PeerIdentityError(f"{node_id}: the peer presented no certificate")
    cert = x509.load_der_x509_certificate(der)
    names = [str(a.value) for a in cert.subject.get_attributes_for_oid(NameOID.COMMON_NAME)]
    if not carries_node_marker(cert):
        raise PeerIdentityError(f"{node_id}: the peer's certificate is not a node certificate")
    if names != [node_id]:
        raise PeerIdentityError(
            f"{node_id}: the peer's certificate names node {', '.join(names) or '(none)'}"
        )


class _PeerSocket(ssl.SSLSocket):
    """A client socket that checks the peer's identity right after the handshake."""

    def do_handshake(self, block: bool = False) -> None:
        super().do_handshake(block)
        context = self.context
        expected = getattr(context, "expected_node", None)
        if expected is None:  # pragma: no cover - set by peer_context
            raise PeerIdentityError("peer context without an expected node")
        _check_peer(self.getpeercert(binary_form=True), expected)


class _PeerContext(ssl.SSLContext):
    sslsocket_class = _PeerSocket
    expected_node: str


def peer_context(tls: TlsSection, node_id: str) -> ssl.SSLContext:
    """Return a client context for reaching peer ``node_id`` with our node certificate.

    Raises OSError or ssl.SSLError for unusable files.
    """
    context = _PeerContext(ssl.PROTOCOL_TLS_CLIENT)
    apply_policy(context)
    context.expected_node = node_id
    context.check_hostname = True
    context.verify_mode = ssl.CERT_REQUIRED
    context.load_verify_locations(cafile=str(tls.ca))
    context.load_cert_chain(str(tls.cert), str(tls.key))
    return context
