"""Bootstrap of the network's PKI: one CA, node certificates and client certificates.

Every caller of a node presents a client certificate issued by the network's CA, and every
node presents a server certificate from the same CA. This module makes those certificates
with ``cryptography.x509``: ECDSA P-256 keys, ECDSA-with-SHA-256 signatures (RFC 5758
section 3.2), X.509 v3 profiles from RFC 5280:

* CA: ``basicConstraints`` cA=TRUE, pathLen=0, critical (4.2.1.9), so it can sign only
  end-entity certificates; ``keyUsage`` keyCertSign, cRLSign and digitalSignature,
  critical (4.2.1.3); ``subjectKeyIdentifier`` (4.2.1.2).
* node: CN is the node ID, OU ``node``; ``subjectAltName`` (4.2.1.6) with a dNSName per
  host name and an iPAddress per IP literal; ``extKeyUsage`` serverAuth and clientAuth
  (4.2.1.12), because nodes serve their API and also call their peers, and the node
  marker (:data:`keystrata.crypto.certificates.NODE_MARKER`): only a certificate with it
  may act as a peer, and a certificate with it may act as nothing else.
* client: CN is the caller's name, OU its role (``sae``, ``operator``, ``auditor``,
  ``qkd-module``, ``monitor``); ``extKeyUsage`` clientAuth only, never the node marker.
  There is no client certificate for role ``peer``: peers present node certificates.
* end-entity certificates: cA=FALSE critical, keyUsage digitalSignature critical (enough
  for ECDHE-ECDSA TLS), subject and authority key identifiers (4.2.1.2, 4.2.1.1).

Serial numbers are random, positive and at most 20 octets (4.1.2.2). ``notBefore`` is set
five minutes in the past so that a peer whose clock runs a little behind accepts a fresh
certificate (4.1.2.5).

Private keys are written and returned as **unencrypted** PKCS #8 PEM. A node must read
its key at start without a person typing a passphrase, so the protection is the file
itself: :class:`PkiDir` creates every key file with mode 0600 in a folder of mode 0700,
and deployments keep the CA key offline once the certificates are issued.

This module lives beside :mod:`keystrata.crypto.hazmat` rather than inside it: it is an
operator tool run before a node starts, and never touches key material of the QKD links.
Reading and checking certificates is :mod:`keystrata.crypto.certificates`.
"""

from __future__ import annotations

import ipaddress
import os
import re
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import NamedTuple

from cryptography import x509
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec
from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

from keystrata.crypto.certificates import NODE_MARKER, load_certificate, require_ca_certificate
from keystrata.crypto.files import write_atomic
from keystrata.errors import AlreadyExists, InvalidInput

ROLES: tuple[str, ...] = ("sae", "operator", "auditor", "peer", "qkd-module", "monitor")
#: Roles a client certificate may carry: every role but ``peer`` (nodes speak as peers
#: with their node certificates, which carry the node marker).
CLIENT_ROLES: tuple[str, ...] = tuple(r for r in ROLES if r != "peer")
NODE_OU = "node"
CLOCK_SKEW = timedelta(minutes=5)
CA_VALID_DAYS = 3650
# 825 days is the longest lifetime browsers accepted for TLS server certificates from
# 2018 to 2020 (CA/Browser Forum baseline requirements), kept here as common practice.
LEAF_VALID_DAYS = 825
# RFC 5280 Appendix A.1: ub-common-name INTEGER ::= 64
_CN_MAX = 64
_HOST_LABEL = r"[A-Za-z0-9](?:[A-Za-z0-9-]{0,61}[A-Za-z0-9])?"
# A host name of LDH labels (RFC 1123 section 2.1); wildcards are not issued to nodes.
_HOSTNAME = re.compile(rf"(?=.{{1,253}}\Z){_HOST_LABEL}(?:\.{_HOST_LABEL})*\Z")
# File stems in a PKI folder: no path separators, no leading dot, nothing shell-unfriendly.
_FILE_STEM = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}\Z")


@dataclass(frozen=True)
class IssuedCert:
    """A certificate and its private key, both PEM. The key is kept out of ``repr``."""

    cert_pem: bytes
    key_pem: bytes = field(repr=False)

    @property
    def certificate(self) -> x509.Certificate:
        """Return the parsed certificate."""
        return x509.load_pem_x509_certificate(self.cert_pem)


def create_ca(
    common_name: str, *, valid_days: int = CA_VALID_DAYS, now: datetime | None = None
) -> IssuedCert:
    """Return a new self-signed CA (certificate and private key).

    Raises InvalidInput for an empty or over-long name, non-positive ``valid_days`` or a
    naive ``now``.
    """
    name = _subject_name(common_name)
    validity = _validity_window(valid_days, now)
    key = ec.generate_private_key(ec.SECP256R1())
    # pathLen 0: this CA signs end-entity certificates only, never another CA.
    extensions: list[tuple[x509.ExtensionType, bool]] = [
        (x509.BasicConstraints(ca=True, path_length=0), True),
        (_key_usage(cert_sign=True), True),
    ]
    return _sign(name, name, key, key, validity, extensions)


def issue_node_cert(
    ca: IssuedCert,
    node_id: str,
    hosts: Sequence[str],
    *,
    valid_days: int = LEAF_VALID_DAYS,
    now: datetime | None = None,
) -> IssuedCert:
    """Return a new node certificate and key, usable as TLS server and as TLS client.

    Raises InvalidInput for a bad node ID, no hosts, a host that is neither an IP literal
    nor a host name, bad validity, a lifetime that would outlast the CA, or a bad CA.
    """
    if isinstance(hosts, str):
        # A bare string is a Sequence[str] too; iterating it would issue one name per letter.
        hosts = [hosts]
    if not hosts:
        raise InvalidInput("a node certificate needs at least one host name or IP address")
    # dict.fromkeys drops repeats (after case folding) while keeping the caller's order.
    san = x509.SubjectAlternativeName(list(dict.fromkeys(_general_name(h) for h in hosts)))
    ekus = [ExtendedKeyUsageOID.SERVER_AUTH, ExtendedKeyUsageOID.CLIENT_AUTH, NODE_MARKER]
    return _issue_leaf(ca, _subject_name(node_id, NODE_OU), ekus, san, valid_days, now)


def issue_client_cert(
    ca: IssuedCert,
    common_name: str,
    role: str,
    *,
    valid_days: int = LEAF_VALID_DAYS,
    now: datetime | None = None,
) -> IssuedCert:
    """Return a new TLS client certificate and key; the subject's OU carries the role.

    Raises InvalidInput for an unknown role or ``peer`` (peers use node certificates),
    a bad name, bad validity, a lifetime that would outlast the CA, or a bad CA.
    """
    if role == "peer":
        raise InvalidInput(
            "peers present node certificates (issue-node), never client certificates",
            details=[{"field": "role", "allowed": list(CLIENT_ROLES)}],
        )
    if role not in CLIENT_ROLES:
        raise InvalidInput(
            f"unknown role {role!r}; expected one of {', '.join(CLIENT_ROLES)}",
            details=[{"field": "role", "allowed": list(CLIENT_ROLES)}],
        )
    ekus = [ExtendedKeyUsageOID.CLIENT_AUTH]
    return _issue_leaf(ca, _subject_name(common_name, role), ekus, None, valid_days, now)


def load_ca(cert_pem: bytes, key_pem: bytes) -> IssuedCert:
    """Return the CA made of ``cert_pem`` and its unencrypted private key ``key_pem``.

    Raises InvalidInput for an unreadable certificate or key, a certificate that is not a
    CA, a key that is not P-256, or a key that does not match the certificate.
    """
    cert, _ = _checked_ca(cert_pem, key_pem)
    return IssuedCert(cert_pem=cert.public_bytes(serialization.Encoding.PEM), key_pem=key_pem)


def _checked_ca(
    cert_pem: bytes, key_pem: bytes
) -> tuple[x509.Certificate, ec.EllipticCurvePrivateKey]:
    cert = load_certificate(cert_pem)
    try:
        key = serialization.load_pem_private_key(key_pem, password=None)
    except (ValueError, TypeError) as exc:
        # The parser's own message is dropped: nothing about the key file reaches the caller.
        raise InvalidInput("the CA key is not an unencrypted PEM private key") from exc
    if not isinstance(key, ec.EllipticCurvePrivateKey) or key.curve.name != "secp256r1":
        raise InvalidInput("the CA key is not an ECDSA P-256 key")
    if key.public_key() != cert.public_key():
        raise InvalidInput("the CA key does not match the CA certificate")
    require_ca_certificate(cert)
    return cert, key


class WrittenFiles(NamedTuple):
    """Paths of a certificate and its private key written to a PKI folder."""

    cert: Path
    key: Path


class PkiDir:
    """A folder holding the CA (``ca.crt``, ``ca.key``) and issued ``<name>.crt/.key``.

    Key files are created with mode 0600 and certificates with 0644; the folder, when this
    class creates it, gets 0700. Each file is written to a fresh temporary file and renamed
    into place, so a crash leaves either the old file or the new one, and overwriting a
    file never inherits the old file's looser mode.
    """

    CA_STEM = "ca"

    def __init__(self, path: str | os.PathLike[str]) -> None:
        self.path = Path(path)

    @property
    def ca_cert_path(self) -> Path:
        return self.path / f"{self.CA_STEM}.crt"

    @property
    def ca_key_path(self) -> Path:
        return self.path / f"{self.CA_STEM}.key"

    def init(
        self,
        common_name: str,
        *,
        force: bool = False,
        valid_days: int = CA_VALID_DAYS,
        now: datetime | None = None,
    ) -> WrittenFiles:
        """Create the CA, write ``ca.crt`` and ``ca.key``, and return their paths.

        Raises AlreadyExists if a CA file is there and ``force`` is false, InvalidInput
        as :func:`create_ca`, OSError if the folder cannot be written.
        """
        if not force:
            existing = [p for p in (self.ca_cert_path, self.ca_key_path) if p.exists()]
            if existing:
                raise AlreadyExists(
                    f"{existing[0]} already exists; refusing to replace the CA without force"
                )
        ca = create_ca(common_name, valid_days=valid_days, now=now)
        return self._write(self.CA_STEM, ca)

    def load_ca(self) -> IssuedCert:
        """Return the CA stored in the folder.

        Raises InvalidInput if there is none or the files do not form a CA, OSError if a
        file cannot be read.
        """
        try:
            cert_pem = self.ca_cert_path.read_bytes()
            key_pem = self.ca_key_path.read_bytes()
        except FileNotFoundError as exc:
            raise InvalidInput(f"no CA in {self.path}; create one with init first") from exc
        return load_ca(cert_pem, key_pem)

    def issue_node(
        self,
        node_id: str,
        hosts: Sequence[str],
        *,
        force: bool = False,
        valid_days: int = LEAF_VALID_DAYS,
        now: datetime | None = None,
    ) -> WrittenFiles:
        """Issue a node certificate, write ``<node_id>.crt/.key``, return their paths.

        Raises AlreadyExists if the files exist and ``force`` is false, InvalidInput for a
        node ID unusable as a file name or as :func:`issue_node_cert`, OSError on I/O.
        """
        self._check_stem(node_id, force)
        issued = issue_node_cert(self.load_ca(), node_id, hosts, valid_days=valid_days, now=now)
        return self._write(node_id, issued)

    def issue_client(
        self,
        name: str,
        role: str,
        *,
        force: bool = False,
        valid_days: int = LEAF_VALID_DAYS,
        now: datetime | None = None,
    ) -> WrittenFiles:
        """Issue a client certificate, write ``<name>.crt/.key``, return their paths.

        Raises AlreadyExists if the files exist and ``force`` is false, InvalidInput for a
        name unusable as a file name or as :func:`issue_client_cert`, OSError on I/O.
        """
        self._check_stem(name, force)
        issued = issue_client_cert(self.load_ca(), name, role, valid_days=valid_days, now=now)
        return self._write(name, issued)

    def _check_stem(self, stem: str, force: bool) -> None:
        if not _FILE_STEM.match(stem):
            raise InvalidInput(
                f"{stem!r} cannot be a file name here: use 1-64 letters, digits, '.', '_' "
                "or '-', starting with a letter or digit"
            )
        if stem == self.CA_STEM:
            raise InvalidInput(f"{stem!r} is reserved for the CA's own files")
        existing = [p for p in (self.path / f"{stem}.crt", self.path / f"{stem}.key") if p.exists()]
        if existing and not force:
            raise AlreadyExists(f"{existing[0]} already exists; refusing to replace it")

    def _write(self, stem: str, issued: IssuedCert) -> WrittenFiles:
        self.path.mkdir(mode=0o700, parents=True, exist_ok=True)
        key_path = self.path / f"{stem}.key"
        cert_path = self.path / f"{stem}.crt"
        # Key first: a crash in between leaves a key with no certificate, never a
        # certificate whose key is missing.
        write_atomic(key_path, issued.key_pem, secret=True)
        write_atomic(cert_path, issued.cert_pem, secret=False)
        return WrittenFiles(cert=cert_path, key=key_path)


def _issue_leaf(
    ca: IssuedCert,
    subject: x509.Name,
    ekus: list[x509.ObjectIdentifier],
    san: x509.SubjectAlternativeName | None,
    valid_days: int,
    now: datetime | None,
) -> IssuedCert:
    validity = _validity_window(valid_days, now)
    ca_cert, ca_key = _checked_ca(ca.cert_pem, ca.key_pem)
    if validity[1] > ca_cert.not_valid_after_utc:
        raise InvalidInput("the certificate would outlive its CA; shorten validity or renew the CA")
    ca_ski = ca_cert.extensions.get_extension_for_class(x509.SubjectKeyIdentifier).value
    extensions: list[tuple[x509.ExtensionType, bool]] = [
        (x509.BasicConstraints(ca=False, path_length=None), True),
        (_key_usage(cert_sign=False), True),
        (x509.ExtendedKeyUsage(ekus), False),
        (x509.AuthorityKeyIdentifier.from_issuer_subject_key_identifier(ca_ski), False),
    ]
    if san is not None:
        # RFC 5280 4.2.1.6: non-critical when the subject name is not empty.
        extensions.append((san, False))
    key = ec.generate_private_key(ec.SECP256R1())
    return _sign(subject, ca_cert.subject, key, ca_key, validity, extensions)


def _sign(
    subject: x509.Name,
    issuer: x509.Name,
    key: ec.EllipticCurvePrivateKey,
    signer: ec.EllipticCurvePrivateKey,
    validity: tuple[datetime, datetime],
    extensions: list[tuple[x509.ExtensionType, bool]],
) -> IssuedCert:
    public_key = key.public_key()
    builder = (
        x509.CertificateBuilder()
        .subject_name(subject)
        .issuer_name(issuer)
        .public_key(public_key)
        .serial_number(x509.random_serial_number())
        .not_valid_before(validity[0])
        .not_valid_after(validity[1])
        # RFC 5280 4.2.1.2: conforming CAs MUST mark this extension non-critical.
        .add_extension(x509.SubjectKeyIdentifier.from_public_key(public_key), critical=False)
    )
    for extension, critical in extensions:
        builder = builder.add_extension(extension, critical=critical)
    cert = builder.sign(signer, hashes.SHA256())
    pem = serialization.Encoding.PEM
    key_pem = key.private_bytes(
        pem, serialization.PrivateFormat.PKCS8, serialization.NoEncryption()
    )
    return IssuedCert(cert_pem=cert.public_bytes(pem), key_pem=key_pem)


def _subject_name(common_name: str, unit: str | None = None) -> x509.Name:
    if not common_name or len(common_name) > _CN_MAX or common_name != common_name.strip():
        raise InvalidInput(
            "a common name must be 1-64 characters without leading or trailing spaces"
        )
    attrs = [x509.NameAttribute(NameOID.COMMON_NAME, common_name)]
    if unit is not None:
        attrs.append(x509.NameAttribute(NameOID.ORGANIZATIONAL_UNIT_NAME, unit))
    return x509.Name(attrs)


def _validity_window(valid_days: int, now: datetime | None) -> tuple[datetime, datetime]:
    if valid_days <= 0:
        raise InvalidInput("valid_days must be a positive number of days")
    if now is None:
        now = datetime.now(UTC)
    elif now.tzinfo is None:
        raise InvalidInput("now must be timezone-aware")
    # Certificates carry whole seconds; drop the rest so the stored times equal what we say.
    now = now.astimezone(UTC).replace(microsecond=0)
    return now - CLOCK_SKEW, now + timedelta(days=valid_days)


def _key_usage(*, cert_sign: bool) -> x509.KeyUsage:
    # digitalSignature is what ECDHE-ECDSA TLS needs; a CA adds certificate and CRL signing.
    return x509.KeyUsage(
        digital_signature=True,
        content_commitment=False,
        key_encipherment=False,
        data_encipherment=False,
        key_agreement=False,
        key_cert_sign=cert_sign,
        crl_sign=cert_sign,
        encipher_only=False,
        decipher_only=False,
    )


def _general_name(host: str) -> x509.GeneralName:
    try:
        return x509.IPAddress(ipaddress.ip_address(host))
    except ValueError:
        pass
    # An all-numeric last label is no host name (RFC 3696 section 2): "127.1" is a
    # shorthand IP literal that Python rejects, and must not slip in as a dNSName.
    if not _HOSTNAME.match(host) or host.rsplit(".", 1)[-1].isdigit():
        raise InvalidInput(
            f"{host!r} is neither an IP address nor a host name",
            details=[{"field": "hosts", "value": host}],
        )
    return x509.DNSName(host.lower())
