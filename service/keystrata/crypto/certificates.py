"""Reading certificates of the network's PKI and checking what they say.

Every function here that is given bytes or a certificate it cannot accept raises
:class:`~keystrata.errors.InvalidInput`, never returns a flag for it, and says nothing of
the content it refused (the caller may have passed a key file by mistake). The one
question with a yes-or-no answer, :func:`carries_node_marker`, is a property of a valid
certificate, not a verdict on a bad one.

Issuing certificates is :mod:`keystrata.crypto.pki`.
"""

from __future__ import annotations

from cryptography import x509
from cryptography.hazmat.primitives import hashes
from cryptography.x509.oid import NameOID

from keystrata.errors import InvalidInput

#: Extended key usage that marks a node certificate. It is an OID of our own, minted
#: from a random UUID (1caf106d-5d72-4532-a0ba-c813df0c8887) under the 2.25 arc: ITU-T
#: X.667 section 6.3 (also RFC 4122 / RFC 9562) lets anyone form "2.25." followed by the
#: UUID read as one unsigned integer, without registering it. Only a certificate with it
#: may act as a peer, and a certificate with it may act as nothing else.
NODE_MARKER_UUID = "1caf106d-5d72-4532-a0ba-c813df0c8887"
NODE_MARKER = x509.ObjectIdentifier("2.25.38127369015564861991866485585501522055")


def load_certificate(data: bytes) -> x509.Certificate:
    """Return the certificate parsed from PEM or DER. Raises InvalidInput otherwise."""
    try:
        if data.lstrip().startswith(b"-----BEGIN"):
            return x509.load_pem_x509_certificate(data)
        return x509.load_der_x509_certificate(data)
    except ValueError as exc:
        # Say nothing of the content: the caller may have passed a key file by mistake.
        raise InvalidInput("not a PEM or DER X.509 certificate") from exc


def subject_common_name(cert_pem_or_der: bytes) -> str:
    """Return the subject's common name.

    Raises InvalidInput for a non-certificate or a subject without exactly one CN.
    """
    attrs = load_certificate(cert_pem_or_der).subject.get_attributes_for_oid(NameOID.COMMON_NAME)
    if len(attrs) != 1:
        raise InvalidInput("the certificate subject must carry exactly one common name")
    return str(attrs[0].value)


def fingerprint_sha256(cert_pem: bytes) -> str:
    """Return the lower-case hex SHA-256 of the certificate's DER encoding: its pin.

    Accepts PEM or DER. Raises InvalidInput for anything that is not a certificate.
    """
    return load_certificate(cert_pem).fingerprint(hashes.SHA256()).hex()


def require_ca_certificate(cert: x509.Certificate) -> None:
    """Return None if ``cert`` is a CA certificate (RFC 5280 4.2.1.9 basicConstraints cA).

    Raises InvalidInput otherwise.
    """
    try:
        is_ca = cert.extensions.get_extension_for_class(x509.BasicConstraints).value.ca
    except x509.ExtensionNotFound:
        is_ca = False
    if not is_ca:
        raise InvalidInput("the certificate is not a CA certificate (basicConstraints cA)")


def carries_node_marker(cert: x509.Certificate) -> bool:
    """Return whether ``cert`` carries the node marker in its extended key usage."""
    try:
        usages = cert.extensions.get_extension_for_class(x509.ExtendedKeyUsage).value
    except x509.ExtensionNotFound:
        return False
    return NODE_MARKER in usages
