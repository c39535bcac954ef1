"""A PKI folder made at run time: one CA, a certificate per node and per client name."""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path

from keystrata.crypto.certificates import fingerprint_sha256
from keystrata.crypto.pki import PkiDir
from keystrata_client import TlsIdentity

#: Names a loopback node certificate is valid for.
LOOPBACK_HOSTS = ("127.0.0.1", "localhost")


@dataclass(frozen=True)
class PkiFiles:
    """A folder of PEM files: ``ca.crt`` and ``<name>.crt`` / ``<name>.key`` per name."""

    dir: Path

    @property
    def ca(self) -> Path:
        return self.dir / "ca.crt"

    def cert(self, name: str) -> Path:
        return self.dir / f"{name}.crt"

    def key(self, name: str) -> Path:
        return self.dir / f"{name}.key"

    def pem(self, name: str) -> str:
        return self.cert(name).read_text()

    def identity(self, name: str) -> TlsIdentity:
        """The client identity presenting certificate ``name`` and trusting our CA."""
        return TlsIdentity(ca=self.ca, cert=self.cert(name), key=self.key(name))

    def pin(self, name: str) -> str:
        """The ``cert_sha256`` pin of certificate ``name``."""
        return cert_pin(self.dir, name)


def cert_pin(folder: Path, name: str) -> str:
    """The ``cert_sha256`` pin of certificate ``name`` in a PKI folder (hex SHA-256 of its
    DER, as RFC 5280 certificates are fingerprinted: common practice)."""
    return fingerprint_sha256((folder / f"{name}.crt").read_bytes())


def make_pki(
    folder: Path, ca_name: str, nodes: Iterable[str], clients: Mapping[str, str]
) -> PkiFiles:
    """Create a CA named ``ca_name`` in ``folder``, a node certificate per node ID (valid
    for the loopback names) and a client certificate per client name -> role."""
    pki = PkiDir(folder)
    pki.init(ca_name)
    for node in nodes:
        pki.issue_node(node, list(LOOPBACK_HOSTS))
    for name, role in clients.items():
        pki.issue_client(name, role)
    return PkiFiles(pki.path)
