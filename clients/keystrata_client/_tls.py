"""Mutual TLS identity of a client: the network CA, and our certificate and key."""

from __future__ import annotations

import ssl
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from keystrata_client._errors import ConnectionProblem

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
            ssl.SSLError: a file is not a usable certificate or key, the key does not
                match the certificate, or the key is encrypted.
        """
        return self._context(None)

    def checked_ssl_context(self) -> ssl.SSLContext:
        """Return :meth:`ssl_context`, its failures told as one sentence with a hint.

        Raises:
            ConnectionProblem: a file is missing or unreadable, the CA file holds no
                certificate, the certificate or key file is not PEM, or the key does not
                belong to the certificate (the message names the file, never its content).
        """
        return self._context(self._explain)

    def _context(
        self, explain: Callable[[str, Exception], ConnectionProblem] | None
    ) -> ssl.SSLContext:
        context = ssl.SSLContext(ssl.PROTOCOL_TLS_CLIENT)
        context.minimum_version = ssl.TLSVersion.TLSv1_2
        context.set_ciphers(TLS12_CIPHERS)
        context.check_hostname = True
        context.verify_mode = ssl.CERT_REQUIRED
        try:
            context.load_verify_locations(cafile=str(self.ca))
        except OSError as exc:  # ssl.SSLError is an OSError
            if explain is None:
                raise
            raise explain("ca", exc) from exc
        try:
            # An encrypted key fails here instead of OpenSSL prompting on the terminal.
            context.load_cert_chain(
                certfile=str(self.cert), keyfile=str(self.key), password=_no_password
            )
        except OSError as exc:
            if explain is None:
                raise
            raise explain("cert", exc) from exc
        return context

    def _explain(self, step: str, exc: Exception) -> ConnectionProblem:
        """The sentence for a failed step: which file, and what is wrong with it."""
        files = (("CA certificate", self.ca),) if step == "ca" else (
            ("client certificate", self.cert), ("client key", self.key))  # fmt: skip
        for what, path in files:
            if not path.exists():
                return ConnectionProblem(f"the {what} file {path} does not exist", _FILE_HINT[what])
            if not path.is_file():
                return ConnectionProblem(f"the {what} file {path} is not a file", _FILE_HINT[what])
            try:
                path.read_bytes()
            except OSError as unreadable:
                return ConnectionProblem(
                    f"the {what} file {path} cannot be read ({unreadable.strerror})",
                    "check its permissions",
                )
        reason = str(getattr(exc, "reason", "") or "")
        if step == "ca":
            return ConnectionProblem(
                f"the CA certificate file {self.ca} holds no usable PEM certificate",
                _FILE_HINT["CA certificate"],
            )
        if reason == "KEY_VALUES_MISMATCH":
            return ConnectionProblem(
                f"the client key {self.key} does not belong to the certificate {self.cert}",
                "give the key file issued together with that certificate "
                "(NAME.key beside NAME.crt in the PKI folder)",
            )
        if "BAD_DECRYPT" in reason or "BAD_PASSWORD" in reason:
            return ConnectionProblem(
                f"the client key {self.key} is encrypted", "give an unencrypted PEM key"
            )
        return ConnectionProblem(
            f"the client certificate {self.cert} or its key {self.key} is not a usable PEM "
            f"file ({reason or 'unreadable'})",
            "give the PEM files written by `keystrata pki issue-client` (NAME.crt, NAME.key)",
        )


_FILE_HINT = {
    "CA certificate": "give the network CA's certificate (ca.crt of the PKI folder)",
    "client certificate": "give your client certificate (NAME.crt of the PKI folder)",
    "client key": "give the private key of your certificate (NAME.key of the PKI folder)",
}


def _no_password() -> bytes:
    return b""
