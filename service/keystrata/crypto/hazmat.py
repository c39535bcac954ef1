"""The hazmat boundary: the only module that uses low-level cryptographic primitives.

It offers a few verbs and nothing else:

* :class:`Keyring` ``seal`` / ``open``: key material at rest, AES-256-GCM (NIST SP 800-38D)
  under the node's key-encryption key (KEK), with the row identity as associated data so
  a sealed value copied to another row fails to open.
* :func:`one_time_mac` / :func:`verify_one_time_mac`: Poly1305 (RFC 8439 section 2.5)
  with a one-time key.
* :func:`sign` / :func:`verify_signature`: Ed25519 (RFC 8032).
* :func:`keyed_fingerprint`: HMAC-SHA-256 (RFC 2104) to recognise a re-sent block without
  keeping its bytes in the clear.
* :func:`check_value` / :func:`verify_check_value`: a station's key confirmation value for
  a pair key segment (truncated HMAC-SHA-256).
* :func:`xor_bytes`, :func:`constant_time_equal`, :func:`random_bytes`.

Verification raises :class:`~keystrata.errors.CryptoError` subclasses; it never returns
a flag. Every stored format starts with a version byte.

Sealed format, version 1::

    0x01 | kek_id (8 bytes) | nonce (12 bytes) | ciphertext || tag (16 bytes)

The associated data authenticated with it is ``0x01 | kek_id | context``.
"""

from __future__ import annotations

import hashlib
import hmac
import os
from collections.abc import Iterable

from cryptography.exceptions import InvalidSignature, InvalidTag
from cryptography.hazmat.primitives import poly1305, serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey
from cryptography.hazmat.primitives.ciphers.aead import AESGCM

from keystrata.errors import CryptoError, SealBroken

SEAL_VERSION = 1
KEK_BYTES = 32
KEK_ID_BYTES = 8
NONCE_BYTES = 12
TAG_BYTES = 16
SEAL_OVERHEAD = 1 + KEK_ID_BYTES + NONCE_BYTES + TAG_BYTES
MAC_KEY_BYTES = 32
MAC_TAG_BYTES = 16
CHECK_BYTES = 16


def random_bytes(n: int) -> bytes:
    """Return ``n`` bytes from the operating system's CSPRNG."""
    return os.urandom(n)


def kek_id(kek: bytes) -> bytes:
    """Return the 8-byte identifier of a KEK (a domain-separated SHA-256 prefix)."""
    return hashlib.sha256(b"keystrata/kek-id/v1\x00" + kek).digest()[:KEK_ID_BYTES]


class Keyring:
    """The KEK used for sealing, plus older KEKs that may still open rows mid-rotation."""

    def __init__(self, current: bytes, older: Iterable[bytes] = ()) -> None:
        for key in (current, *older):
            if len(key) != KEK_BYTES:
                raise CryptoError("a key-encryption key must be exactly 32 bytes")
        self.current_id = kek_id(current)
        self._ciphers: dict[bytes, AESGCM] = {kek_id(k): AESGCM(k) for k in older}
        self._ciphers[self.current_id] = AESGCM(current)

    def seal(self, plaintext: bytes, context: bytes) -> bytes:
        """Encrypt ``plaintext`` under the current KEK, bound to ``context``."""
        header = bytes([SEAL_VERSION]) + self.current_id
        nonce = os.urandom(NONCE_BYTES)
        body = self._ciphers[self.current_id].encrypt(nonce, plaintext, header + context)
        return header + nonce + body

    def open(self, sealed: bytes, context: bytes) -> bytes:
        """Decrypt a sealed value bound to ``context``.

        Raises:
            SealBroken: unknown version or KEK, tampered bytes, or another row's context.
        """
        if len(sealed) < SEAL_OVERHEAD or sealed[0] != SEAL_VERSION:
            raise SealBroken()
        key_id = sealed[1 : 1 + KEK_ID_BYTES]
        cipher = self._ciphers.get(key_id)
        if cipher is None:
            raise SealBroken("sealed value was made under a key-encryption key not loaded")
        nonce = sealed[1 + KEK_ID_BYTES : 1 + KEK_ID_BYTES + NONCE_BYTES]
        try:
            return cipher.decrypt(
                nonce,
                sealed[1 + KEK_ID_BYTES + NONCE_BYTES :],
                sealed[: 1 + KEK_ID_BYTES] + context,
            )
        except InvalidTag as exc:
            raise SealBroken() from exc

    @staticmethod
    def sealed_kek_id(sealed: bytes) -> bytes:
        """Return the KEK identifier a sealed value was made under. Raises SealBroken."""
        if len(sealed) < SEAL_OVERHEAD or sealed[0] != SEAL_VERSION:
            raise SealBroken()
        return sealed[1 : 1 + KEK_ID_BYTES]


def one_time_mac(key: bytes, message: bytes) -> bytes:
    """Return the 16-byte Poly1305 tag of ``message`` under a 32-byte one-time ``key``."""
    _check_mac_key(key)
    return poly1305.Poly1305.generate_tag(key, message)


def _check_mac_key(key: bytes) -> None:
    if len(key) != MAC_KEY_BYTES:
        raise CryptoError("a one-time MAC key must be exactly 32 bytes")


def verify_one_time_mac(key: bytes, message: bytes, tag: bytes) -> None:
    """Check a Poly1305 tag in constant time. Raises CryptoError when it does not match."""
    _check_mac_key(key)
    try:
        poly1305.Poly1305.verify_tag(key, message, tag)
    except InvalidSignature as exc:
        raise CryptoError("message authentication failed") from exc


def generate_signing_key() -> bytes:
    """Return a new Ed25519 private key as its 32 raw bytes."""
    return Ed25519PrivateKey.generate().private_bytes(
        serialization.Encoding.Raw, serialization.PrivateFormat.Raw, serialization.NoEncryption()
    )


def public_key_of(private_key: bytes) -> bytes:
    """Return the raw 32-byte Ed25519 public key for a raw private key."""
    return (
        _private(private_key)
        .public_key()
        .public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)
    )


def _private(raw: bytes) -> Ed25519PrivateKey:
    try:
        return Ed25519PrivateKey.from_private_bytes(raw)
    except ValueError as exc:
        raise CryptoError("an Ed25519 private key must be exactly 32 bytes") from exc


def sign(private_key: bytes, message: bytes) -> bytes:
    """Return the 64-byte Ed25519 signature of ``message``."""
    return _private(private_key).sign(message)


def verify_signature(public_key: bytes, message: bytes, signature: bytes) -> None:
    """Check an Ed25519 signature. Raises CryptoError when it does not verify."""
    try:
        Ed25519PublicKey.from_public_bytes(public_key).verify(signature, message)
    except (InvalidSignature, ValueError) as exc:
        raise CryptoError("signature does not verify") from exc


def keyed_fingerprint(key: bytes, *parts: bytes) -> bytes:
    """Return HMAC-SHA-256 over length-prefixed ``parts`` (unambiguous concatenation)."""
    mac = hmac.new(key, digestmod=hashlib.sha256)
    for part in parts:
        mac.update(len(part).to_bytes(8, "big"))
        mac.update(part)
    return mac.digest()


def check_value(key: bytes, identity: bytes, station: str) -> bytes:
    """Return one station's key confirmation value for a segment: HMAC-SHA-256 (RFC 2104)
    under the segment key, over the segment's whole identity (its canonical bytes,
    :meth:`keystrata.relay.arithmetic.SegmentIdentity.canonical`) and the station's own
    ID (so the two stations' values differ and a reflected value proves nothing),
    truncated to 16 bytes. Two stations that disagree on the identity, or hold different
    bytes, never match."""
    message = b"keystrata/confirm/v2\x00" + identity + b"\x00" + station.encode()
    return hmac.new(key, message, hashlib.sha256).digest()[:CHECK_BYTES]


def verify_check_value(key: bytes, identity: bytes, station: str, value: bytes) -> None:
    """Check ``station``'s confirmation value in constant time. Raises CryptoError when
    it does not match."""
    if not hmac.compare_digest(value, check_value(key, identity, station)):
        raise CryptoError("key confirmation failed")


def constant_time_equal(a: bytes, b: bytes) -> bool:
    """Compare two byte strings in time independent of where they differ."""
    return hmac.compare_digest(a, b)


def xor_bytes(a: bytes, b: bytes) -> bytes:
    """Return ``a`` XOR ``b`` (equal lengths), at big-integer speed rather than per byte."""
    if len(a) != len(b):
        raise CryptoError("xor operands differ in length")
    n = len(a)
    return (int.from_bytes(a, "little") ^ int.from_bytes(b, "little")).to_bytes(n, "little")
