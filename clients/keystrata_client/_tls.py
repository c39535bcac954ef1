"""Mutual TLS identity of a client: the network CA, and our certificate and key."""

from __future__ import annotations

import ssl
from dataclasses import dataclass
from pathlib import Path

#: TLS 1.2 suites we offer: ECDHE with AES-GCM or ChaCha20-Poly1305 only (RFC 5289,
#: RFC 7905), as the nodes accept; TLS 1.3 suites are OpenSSL's defaults (all AEAD).
TLS12_CIPHERS = "ECDHE+AESGCM:ECDHE+CHACHA20:!aNULL:!eNULL"


@dataclass(frozen=True, slots=True)
class TlsIdentity:
    """Files that authenticate a client to a keystrata node over mutual TLS.

    Attributes:
        ca: PEM file of the network CA; the server's certificate must chain to it.
        cert: PEM file of our client certificate (it may carry intermediates after it).
        key: PEM file of the private key of ``cert`` (unencrypted).
    """

    ca: Path
    cert: Path
    key: Path

    def ssl_context(self) -> ssl.SSLContext:
        """Return a client-side SSL context for this identity.

        The context verifies the server's certificate against ``ca`` only (not the
        system store), checks the host name, refuses protocols older than TLS 1.2 and
        TLS 1.2 suites other than ECDHE with an AEAD cipher, and presents ``cert``.

        Raises:
            FileNotFoundError: one of the files does not exist.
            ssl.SSLError: a file is not a usable certificate or key, or the key does not
                match the certificate.
        """
        context = ssl.SSLContext(ssl.PROTOCOL_TLS_CLIENT)
        context.minimum_version = ssl.TLSVersion.TLSv1_2
        context.set_ciphers(TLS12_CIPHERS)
        context.check_hostname = True
        context.verify_mode = ssl.CERT_REQUIRED
        context.load_verify_locations(cafile=str(self.ca))
        context.load_cert_chain(certfile=str(self.cert), keyfile=str(self.key))
        return context
