"""Certificate revocation: the CA's certificate revocation list, and reading it back.

``keystrata pki revoke`` adds a certificate to the CRL in the PKI folder (``crl.pem``)
and signs a new one with the CA key. The CRL is the revoked list itself: each revoke
reads the current ``crl.pem``, checks that this CA signed it, and writes a new CRL with
every entry it had plus the new one. The profile follows RFC 5280 section 5:

* version 2, issuer = the CA's subject, ``thisUpdate`` now, ``nextUpdate`` a few days on
  (5.1.2.4, 5.1.2.5): a CRL whose next update has passed makes every handshake fail at
  the nodes (OpenSSL's "CRL has expired"), so it is refreshed (``keystrata pki crl``)
  well before that;
* ``authorityKeyIdentifier`` (5.2.1, MUST) and ``cRLNumber`` (5.2.3, MUST, grows by one
  with each CRL issued);
* per entry: the serial, the revocation date and, unless unspecified, ``reasonCode``
  (5.3.1; "unspecified" SHOULD be left out).

Nodes read the file with :class:`CrlWatch`, which re-reads it when the file changes and
keeps the last good CRL when a new file does not verify.
"""

from __future__ import annotations

import logging
import os
import threading
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING

from cryptography import x509
from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import hashes, serialization
from cryptography.hazmat.primitives.asymmetric import ec

from keystrata.crypto.certificates import load_certificate
from keystrata.crypto.files import write_atomic
from keystrata.errors import InvalidInput

if TYPE_CHECKING:  # issuing certificates is for the CLI; a serving node only reads CRLs
    from keystrata.crypto.pki import PkiDir

log = logging.getLogger("keystrata.revocation")

CRL_FILE = "crl.pem"
DEFAULT_NEXT_UPDATE_DAYS = 7
#: Reasons an operator may give (RFC 5280 5.3.1 CRLReason), by their x509 names.
REASONS: dict[str, x509.ReasonFlags] = {
    r.value: r
    for r in x509.ReasonFlags
    if r not in (x509.ReasonFlags.remove_from_crl, x509.ReasonFlags.aa_compromise)
}


@dataclass(frozen=True, slots=True)
class CrlWritten:
    """What a revoke or refresh wrote."""

    path: Path
    number: int
    next_update: datetime
    revoked: int  # entries in the new CRL
    added: bool  # False when the serial was revoked already


def crl_path(pki: PkiDir) -> Path:
    return pki.path / CRL_FILE


def revoke(
    pki: PkiDir,
    *,
    cert: bytes | None = None,
    serial: int | None = None,
    reason: str = "unspecified",
    next_update_days: int = DEFAULT_NEXT_UPDATE_DAYS,
    now: datetime | None = None,
) -> CrlWritten:
    """Add a certificate (given whole, or by serial) to the CRL and write a new CRL.

    Revoking a serial that is on the list already keeps its first entry. Raises
    InvalidInput for neither or both of ``cert`` and ``serial``, a certificate this CA did
    not issue, the CA's own serial, an unknown reason, bad days, or a ``crl.pem`` that
    this CA did not sign; OSError on I/O.
    """
    if (cert is None) == (serial is None):
        raise InvalidInput("name the certificate to revoke by file or by serial, not both")
    if reason not in REASONS:
        raise InvalidInput(f"unknown reason {reason!r}; expected one of {', '.join(REASONS)}")
    ca = pki.load_ca()
    ca_cert = ca.certificate
    if cert is not None:
        leaf = load_certificate(cert)
        try:
            leaf.verify_directly_issued_by(ca_cert)
        except (ValueError, TypeError, InvalidSignature) as exc:
            raise InvalidInput("the certificate was not issued by this CA") from exc
        serial = leaf.serial_number
    assert serial is not None
    if serial <= 0:
        raise InvalidInput("a certificate serial is a positive number (RFC 5280 4.1.2.2)")
    if serial == ca_cert.serial_number:
        raise InvalidInput("that is the CA's own serial; replace the CA instead")
    return _issue(pki, serial, REASONS[reason], next_update_days, now)


def refresh(
    pki: PkiDir, *, next_update_days: int = DEFAULT_NEXT_UPDATE_DAYS, now: datetime | None = None
) -> CrlWritten:
    """Write a new CRL with the same entries (a new number and next update)."""
    return _issue(pki, None, None, next_update_days, now)


def read_crl(data: bytes, ca_cert: x509.Certificate) -> x509.CertificateRevocationList:
    """Return the CRL in ``data`` (PEM or DER) after checking that ``ca_cert`` signed it.

    Raises InvalidInput for anything else.
    """
    try:
        if data.lstrip().startswith(b"-----BEGIN"):
            crl = x509.load_pem_x509_crl(data)
        else:
            crl = x509.load_der_x509_crl(data)
    except ValueError as exc:
        raise InvalidInput("not a PEM or DER certificate revocation list") from exc
    public_key = ca_cert.public_key()
    if not isinstance(public_key, ec.EllipticCurvePublicKey):
        raise InvalidInput("the CA key is not an ECDSA key")
    if crl.issuer != ca_cert.subject or not crl.is_signature_valid(public_key):
        raise InvalidInput("the revocation list is not signed by this CA")
    return crl


def _issue(
    pki: PkiDir,
    serial: int | None,
    reason: x509.ReasonFlags | None,
    next_update_days: int,
    now: datetime | None,
) -> CrlWritten:
    if not 1 <= next_update_days <= 366:
        raise InvalidInput("next_update_days must be between 1 and 366")
    now = (now or datetime.now(UTC)).astimezone(UTC).replace(microsecond=0)
    ca = pki.load_ca()
    ca_cert = ca.certificate
    key = serialization.load_pem_private_key(ca.key_pem, password=None)
    assert isinstance(key, ec.EllipticCurvePrivateKey)  # load_ca checked it
    entries: list[x509.RevokedCertificate] = []
    number = 0
    path = crl_path(pki)
    if path.exists():
        old = read_crl(path.read_bytes(), ca_cert)
        number = old.extensions.get_extension_for_class(x509.CRLNumber).value.crl_number
        entries = list(old)
    added = serial is not None and all(e.serial_number != serial for e in entries)
    if added:
        assert serial is not None
        entry = x509.RevokedCertificateBuilder().serial_number(serial).revocation_date(now)
        if reason is not None and reason is not x509.ReasonFlags.unspecified:
            entry = entry.add_extension(x509.CRLReason(reason), critical=False)
        entries.append(entry.build())
    ski = ca_cert.extensions.get_extension_for_class(x509.SubjectKeyIdentifier).value
    next_update = now + timedelta(days=next_update_days)
    builder = (
        x509.CertificateRevocationListBuilder()
        .issuer_name(ca_cert.subject)
        .last_update(now)
        .next_update(next_update)
        .add_extension(
            x509.AuthorityKeyIdentifier.from_issuer_subject_key_identifier(ski), critical=False
        )
        .add_extension(x509.CRLNumber(number + 1), critical=False)
    )
    for revoked in entries:
        builder = builder.add_revoked_certificate(revoked)
    crl = builder.sign(key, hashes.SHA256())
    write_atomic(path, crl.public_bytes(serialization.Encoding.PEM), secret=False)
    return CrlWritten(path, number + 1, next_update, len(entries), added)


class CrlWatch:
    """The serials a CRL file revokes, re-read whenever the file changes.

    ``current()`` looks at the file's identity (inode, size, modification time) on each
    call, which costs one ``stat``; a changed file is parsed and its signature checked
    against the CA. A file that cannot be read or does not verify leaves the last good
    CRL in force (and is logged); before any good CRL, :meth:`revoked` raises.
    """

    def __init__(self, crl: Path, ca: Path) -> None:
        self.crl_file = crl
        self._ca = load_certificate(ca.read_bytes())
        self._lock = threading.Lock()
        self._seen: tuple[int, int, int] | None = None
        self._pem: bytes | None = None
        self._serials: frozenset[int] | None = None
        self.current()

    def current(self) -> bytes | None:
        """Return the PEM of the CRL in force (None before a good one was read)."""
        try:
            st = os.stat(self.crl_file)
            seen = (st.st_ino, st.st_size, st.st_mtime_ns)
        except OSError:
            seen = None
        with self._lock:
            if seen is not None and seen != self._seen:
                self._seen = seen
                self._load()
            return self._pem

    def _load(self) -> None:
        try:
            data = self.crl_file.read_bytes()
            crl = read_crl(data, self._ca)
        except (OSError, InvalidInput) as exc:
            log.error(
                "revocation list %s not loaded (%s); the previous one stays", self.crl_file, exc
            )
            return
        self._pem = crl.public_bytes(serialization.Encoding.PEM)
        self._serials = frozenset(e.serial_number for e in crl)
        log.info("revocation list %s loaded: %d revoked", self.crl_file, len(self._serials))

    def revoked(self, cert: x509.Certificate) -> bool:
        """Return whether the CRL in force lists ``cert``'s serial.

        Raises InvalidInput when no good CRL was ever read (fail closed).
        """
        self.current()
        serials = self._serials
        if serials is None:
            raise InvalidInput("no valid revocation list")
        return cert.serial_number in serials
