"""The hazmat boundary, checked against published vectors and independent re-computations.

Sources, named again beside each check:

* AES-256-GCM: NIST CAVP GCM test vectors (gcmtestvectors, for NIST SP 800-38D), as
  shipped in the ``cryptography_vectors`` package (``ciphers/AES/GCM/*.rsp``).
* Poly1305: RFC 8439 section 2.5.2 and Appendix A.3, in ``vectors/rfc8439_poly1305.json``.
* Ed25519: RFC 8032 section 7.1, in ``vectors/rfc8032_ed25519.json``.
* HMAC-SHA-256 (fingerprints, confirmation check values): Python's ``hmac`` module, itself
  checked against RFC 4231 section 4.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import os
from pathlib import Path
from typing import Any

import cryptography_vectors
import pytest
from cryptography.exceptions import InvalidTag
from cryptography.hazmat.primitives.ciphers.aead import AESGCM
from hypothesis import given
from hypothesis import strategies as st

from keystrata.crypto import hazmat
from keystrata.crypto.hazmat import Keyring
from keystrata.errors import CryptoError, SealBroken

VECTORS = Path(__file__).parents[1] / "vectors"
KEK = bytes(range(32))
OTHER_KEK = bytes(range(32, 64))


def _load_json(name: str) -> dict[str, Any]:
    doc: dict[str, Any] = json.loads((VECTORS / name).read_text())
    assert doc["source"]  # every vector file names where its bytes come from
    return doc


def _nist_rsp(relative: str) -> list[dict[str, str]]:
    """Parse a NIST CAVP ``.rsp`` file: ``[Name = value]`` headers, then ``Name = value``
    records separated by blank lines; a bare ``FAIL`` line marks an inauthentic input."""
    records: list[dict[str, str]] = []
    header: dict[str, str] = {}
    with cryptography_vectors.open_vector_file(relative, "r") as fh:
        for raw in fh:
            line = raw.strip()
            if not line or line.startswith("#"):
                continue
            if line.startswith("["):
                name, _, value = line.strip("[]").partition("=")
                header = {**header, name.strip(): value.strip()}
            elif line == "FAIL":
                records[-1]["FAIL"] = "1"
            else:
                name, _, value = line.partition("=")
                if name.strip() == "Count":
                    records.append(dict(header))
                records[-1][name.strip()] = value.strip()
    return records


def _gcm_cases(relative: str) -> list[Any]:
    # The subset our Keyring uses: 256-bit key, 96-bit IV, 128-bit tag.
    cases = [
        r
        for r in _nist_rsp(relative)
        if r["Keylen"] == "256" and r["IVlen"] == "96" and r["Taglen"] == "128"
    ]
    assert cases
    return [pytest.param(r, id=f"PT{r['PTlen']}-AAD{r['AADlen']}-{r['Count']}") for r in cases]


# --- AES-256-GCM: the primitive under Keyring ----------------------------------------------


@pytest.mark.parametrize(
    "case", _gcm_cases(os.path.join("ciphers", "AES", "GCM", "gcmEncryptExtIV256.rsp"))
)
def test_aesgcm_reproduces_nist_cavp_encrypt_vectors(case: dict[str, str]) -> None:
    # NIST SP 800-38D, CAVP gcmtestvectors gcmEncryptExtIV256.rsp
    out = AESGCM(bytes.fromhex(case["Key"])).encrypt(
        bytes.fromhex(case["IV"]), bytes.fromhex(case["PT"]), bytes.fromhex(case["AAD"])
    )
    assert out == bytes.fromhex(case["CT"] + case["Tag"])


@pytest.mark.parametrize(
    "case", _gcm_cases(os.path.join("ciphers", "AES", "GCM", "gcmDecrypt256.rsp"))
)
def test_aesgcm_reproduces_nist_cavp_decrypt_vectors(case: dict[str, str]) -> None:
    # NIST SP 800-38D, CAVP gcmtestvectors gcmDecrypt256.rsp: FAIL cases must not open.
    cipher = AESGCM(bytes.fromhex(case["Key"]))
    args = (
        bytes.fromhex(case["IV"]),
        bytes.fromhex(case["CT"] + case["Tag"]),
        bytes.fromhex(case["AAD"]),
    )
    if "FAIL" in case:
        with pytest.raises(InvalidTag):
            cipher.decrypt(*args)
    else:
        assert cipher.decrypt(*args) == bytes.fromhex(case["PT"])


# --- Keyring: sealed format and behaviour ---------------------------------------------------


def _expected_kek_id(kek: bytes) -> bytes:
    # Recomputed from hazmat's documented derivation, not by calling hazmat.kek_id.
    return hashlib.sha256(b"keystrata/kek-id/v1\x00" + kek).digest()[:8]


def test_sealed_value_has_the_documented_layout_and_opens_with_plain_aesgcm() -> None:
    plaintext, context = b"link key block 7", b"link_key_block:42"
    sealed = Keyring(KEK).seal(plaintext, context)
    # Layout from hazmat's docstring: 0x01 | kek_id (8) | nonce (12) | ciphertext || tag (16)
    assert sealed[0] == 1
    assert sealed[1:9] == _expected_kek_id(KEK)
    assert len(sealed) == 1 + 8 + 12 + len(plaintext) + 16
    assert hazmat.SEAL_OVERHEAD == 1 + 8 + 12 + 16
    nonce, body = sealed[9:21], sealed[21:]
    aad = bytes([1]) + _expected_kek_id(KEK) + context
    assert AESGCM(KEK).decrypt(nonce, body, aad) == plaintext
    assert Keyring.sealed_kek_id(sealed) == _expected_kek_id(KEK)


def test_each_seal_uses_a_fresh_nonce() -> None:
    ring = Keyring(KEK)
    nonces = {ring.seal(b"same", b"row:1")[9:21] for _ in range(64)}
    assert len(nonces) == 64


@given(plaintext=st.binary(max_size=512), context=st.binary(max_size=64))
def test_seal_open_round_trip(plaintext: bytes, context: bytes) -> None:
    ring = Keyring(KEK)
    assert ring.open(ring.seal(plaintext, context), context) == plaintext


def test_a_value_moved_to_another_row_does_not_open() -> None:
    ring = Keyring(KEK)
    sealed = ring.seal(b"pair key segment", b"segment:1")
    with pytest.raises(SealBroken):
        ring.open(sealed, b"segment:2")


def test_any_flipped_byte_breaks_the_seal() -> None:
    ring = Keyring(KEK)
    sealed = ring.seal(b"0123456789abcdef", b"row:1")
    for i in range(len(sealed)):
        tampered = bytearray(sealed)
        tampered[i] ^= 0x01
        with pytest.raises(SealBroken):
            ring.open(bytes(tampered), b"row:1")


@pytest.mark.parametrize("cut", [0, 1, hazmat.SEAL_OVERHEAD - 1])
def test_truncated_values_break_the_seal(cut: int) -> None:
    ring = Keyring(KEK)
    with pytest.raises(SealBroken):
        ring.open(ring.seal(b"", b"row:1")[:cut], b"row:1")


def test_an_unknown_kek_breaks_the_seal() -> None:
    sealed = Keyring(KEK).seal(b"secret", b"row:1")
    with pytest.raises(SealBroken):
        Keyring(OTHER_KEK).open(sealed, b"row:1")


def test_an_older_kek_still_opens_during_rotation() -> None:
    sealed_before = Keyring(KEK).seal(b"old row", b"row:1")
    rotated = Keyring(OTHER_KEK, older=[KEK])
    assert rotated.open(sealed_before, b"row:1") == b"old row"
    sealed_after = rotated.seal(b"new row", b"row:2")
    assert Keyring.sealed_kek_id(sealed_after) == _expected_kek_id(OTHER_KEK)
    with pytest.raises(SealBroken):
        Keyring(KEK).open(sealed_after, b"row:2")


@pytest.mark.parametrize(
    ("current", "older"),
    [(b"\x07" * 31, []), (b"\x07" * 33, []), (b"", []), (KEK, [b"\x07" * 16])],
)
def test_wrong_kek_length_is_refused(current: bytes, older: list[bytes]) -> None:
    with pytest.raises(CryptoError) as caught:
        Keyring(current, older)
    assert "0707" not in str(caught.value)
    assert "\x07" not in str(caught.value)


# --- Poly1305 ------------------------------------------------------------------------------

POLY1305 = _load_json("rfc8439_poly1305.json")


@pytest.mark.parametrize("vector", POLY1305["vectors"], ids=lambda v: v["name"])
def test_one_time_mac_matches_rfc8439(vector: dict[str, str]) -> None:
    # RFC 8439 section 2.5.2 / Appendix A.3 (each vector's "source" names which)
    key, message = bytes.fromhex(vector["key"]), bytes.fromhex(vector["message"])
    tag = bytes.fromhex(vector["tag"])
    assert hazmat.one_time_mac(key, message) == tag
    hazmat.verify_one_time_mac(key, message, tag)


@pytest.mark.parametrize("vector", POLY1305["vectors"], ids=lambda v: v["name"])
def test_wrong_mac_tags_are_refused(vector: dict[str, str]) -> None:
    key, message = bytes.fromhex(vector["key"]), bytes.fromhex(vector["message"])
    tag = bytes.fromhex(vector["tag"])
    for bad in (bytes([tag[0] ^ 0x01]) + tag[1:], tag[:-1] + bytes([tag[-1] ^ 0x80]), tag[:15]):
        with pytest.raises(CryptoError):
            hazmat.verify_one_time_mac(key, message, bad)
    # With r = 0 (A.3 #1 and #2) the tag is s whatever the message, so only a key with a
    # non-zero r can show that a changed message is refused.
    if any(key[:16]):
        with pytest.raises(CryptoError):
            hazmat.verify_one_time_mac(key, message + b"\x00", tag)


def test_poly1305_json_matches_the_published_file() -> None:
    # Guards the transcription: every RFC 8439 Appendix A.3 vector in our JSON appears in
    # cryptography_vectors' poly1305/rfc7539.txt (RFC 7539 A.3, carried into RFC 8439).
    with cryptography_vectors.open_vector_file(os.path.join("poly1305", "rfc7539.txt"), "r") as fh:
        published = fh.read().lower()
    appendix = [v for v in POLY1305["vectors"] if v["name"].startswith("A.3")]
    assert len(appendix) == 11
    for v in appendix:
        assert f"key = {v['key']}\nmsg = {v['message']}\ntag = {v['tag']}" in published


# --- Ed25519 -------------------------------------------------------------------------------

ED25519 = _load_json("rfc8032_ed25519.json")


@pytest.mark.parametrize("vector", ED25519["vectors"], ids=lambda v: v["name"])
def test_ed25519_matches_rfc8032(vector: dict[str, str]) -> None:
    # RFC 8032 section 7.1 (TEST 1, 2, 3): Ed25519 is deterministic, so the exact
    # signature bytes must come out.
    secret, public = bytes.fromhex(vector["secret_key"]), bytes.fromhex(vector["public_key"])
    message, signature = bytes.fromhex(vector["message"]), bytes.fromhex(vector["signature"])
    assert hazmat.public_key_of(secret) == public
    assert hazmat.sign(secret, message) == signature
    hazmat.verify_signature(public, message, signature)


@pytest.mark.parametrize("vector", ED25519["vectors"], ids=lambda v: v["name"])
@pytest.mark.parametrize("bit", [0, 7, 255, 256, 511])
def test_a_flipped_signature_bit_is_refused(vector: dict[str, str], bit: int) -> None:
    public, message = bytes.fromhex(vector["public_key"]), bytes.fromhex(vector["message"])
    signature = bytearray.fromhex(vector["signature"])
    signature[bit // 8] ^= 1 << (bit % 8)
    with pytest.raises(CryptoError):
        hazmat.verify_signature(public, message, bytes(signature))


@pytest.mark.parametrize("vector", ED25519["vectors"], ids=lambda v: v["name"])
def test_other_messages_keys_and_lengths_are_refused(vector: dict[str, str]) -> None:
    public, message = bytes.fromhex(vector["public_key"]), bytes.fromhex(vector["message"])
    signature = bytes.fromhex(vector["signature"])
    for args in (
        (public, message + b"!", signature),
        (public, message, signature[:63]),
        (public[:31], message, signature),
        (hazmat.public_key_of(hazmat.generate_signing_key()), message, signature),
    ):
        with pytest.raises(CryptoError):
            hazmat.verify_signature(*args)


def test_ed25519_json_matches_the_reference_file() -> None:
    # Guards the transcription: RFC 8032 section 7.1 TEST 1-3 are also the first lines of
    # the Ed25519 reference test file sign.input (format: sk||pk:pk:msg:sig||msg:).
    with cryptography_vectors.open_vector_file(
        os.path.join("asymmetric", "Ed25519", "sign.input"), "r"
    ) as fh:
        lines = set(fh.read().splitlines())
    for v in ED25519["vectors"]:
        sk, pk, msg, sig = v["secret_key"], v["public_key"], v["message"], v["signature"]
        assert f"{sk}{pk}:{pk}:{msg}:{sig}{msg}:" in lines


def test_generated_signing_keys_sign_and_verify() -> None:
    secret = hazmat.generate_signing_key()
    assert len(secret) == 32
    public = hazmat.public_key_of(secret)
    hazmat.verify_signature(public, b"ledger checkpoint", hazmat.sign(secret, b"ledger checkpoint"))


# --- small helpers ---------------------------------------------------------------------------

_same_length_pairs = st.integers(min_value=0, max_value=300).flatmap(
    lambda n: st.tuples(st.binary(min_size=n, max_size=n), st.binary(min_size=n, max_size=n))
)


@given(pair=_same_length_pairs)
def test_xor_bytes_matches_a_per_byte_xor(pair: tuple[bytes, bytes]) -> None:
    a, b = pair
    out = hazmat.xor_bytes(a, b)
    assert out == bytes(x ^ y for x, y in zip(a, b, strict=True))
    assert hazmat.xor_bytes(out, b) == a  # one-time pad round trip


def test_xor_bytes_keeps_leading_and_trailing_zero_bytes() -> None:
    assert hazmat.xor_bytes(b"\x00\x01\x00", b"\x00\x00\x00") == b"\x00\x01\x00"
    assert hazmat.xor_bytes(b"\xff\xff", b"\xff\xff") == b"\x00\x00"
    assert hazmat.xor_bytes(b"", b"") == b""


@pytest.mark.parametrize(("a", "b"), [(b"a", b""), (b"", b"a"), (b"abc", b"ab")])
def test_xor_bytes_refuses_different_lengths(a: bytes, b: bytes) -> None:
    with pytest.raises(CryptoError):
        hazmat.xor_bytes(a, b)


@given(key=st.binary(min_size=1, max_size=64), parts=st.lists(st.binary(max_size=40), max_size=5))
def test_keyed_fingerprint_is_hmac_sha256_of_length_prefixed_parts(
    key: bytes, parts: list[bytes]
) -> None:
    # The documented encoding: each part as an 8-byte big-endian length, then its bytes.
    encoded = b"".join(len(p).to_bytes(8, "big") + p for p in parts)
    assert hazmat.keyed_fingerprint(key, *parts) == hmac.new(key, encoded, "sha256").digest()


def test_keyed_fingerprint_separates_parts() -> None:
    key = b"k" * 32
    assert hazmat.keyed_fingerprint(key, b"ab", b"c") != hazmat.keyed_fingerprint(key, b"a", b"bc")
    assert hazmat.keyed_fingerprint(key, b"abc") != hazmat.keyed_fingerprint(key, b"abc", b"")


def test_python_hmac_reproduces_rfc4231() -> None:
    # Anchors the reference used above: RFC 4231 section 4 HMAC-SHA-256 test cases, from
    # cryptography_vectors' HMAC/rfc-4231-sha256.txt.
    cases: list[dict[str, str]] = []
    with cryptography_vectors.open_vector_file(
        os.path.join("HMAC", "rfc-4231-sha256.txt"), "r"
    ) as fh:
        for raw in fh:
            name, _, value = raw.strip().partition(" = ")
            if name == "Len":
                cases.append({})
            elif name in ("Key", "Msg", "MD"):
                cases[-1][name] = value
    assert len(cases) >= 6
    for case in cases:
        key, msg = bytes.fromhex(case["Key"]), bytes.fromhex(case["Msg"])
        assert hmac.new(key, msg, "sha256").hexdigest() == case["MD"]


def test_constant_time_equal() -> None:
    assert hazmat.constant_time_equal(b"", b"")
    assert hazmat.constant_time_equal(b"same bytes", b"same bytes")
    assert not hazmat.constant_time_equal(b"same bytes", b"Same bytes")
    assert not hazmat.constant_time_equal(b"same bytes", b"same byteS")
    assert not hazmat.constant_time_equal(b"same bytes", b"same byte")


def test_random_bytes_length_and_variety() -> None:
    assert len(hazmat.random_bytes(32)) == 32
    assert hazmat.random_bytes(0) == b""
    assert len({hazmat.random_bytes(16) for _ in range(32)}) == 32


#: A segment identity as RFC 8785 canonical JSON (relay/arithmetic.SegmentIdentity).
IDENTITY = (
    b'{"bytes":4096,"cipher_station":"station-b","epsilon":1e-9,"notice_station":"station-a",'
    b'"owner":"station-a","pair":"pair-ab","segment":"6f1c1a0e-3f3c-4c84-9d61-1f2b4a4c9e01"}'
)


def test_check_value_is_truncated_hmac_sha256_over_identity_and_station() -> None:
    # Independent re-computation with Python's hmac (anchored to RFC 4231 above), and the
    # values pinned so the confirmation format cannot drift between two node versions.
    key = bytes(range(32))
    for station, pinned in (
        ("station-a", "198aec2131baa6008fd6f73b24409241"),
        ("station-b", "55a2715441ae4b84675887e473763c8d"),
    ):
        message = b"keystrata/confirm/v2\x00" + IDENTITY + b"\x00" + station.encode()
        expected = hmac.new(key, message, hashlib.sha256).digest()[:16]
        assert hazmat.check_value(key, IDENTITY, station) == expected
        assert expected.hex() == pinned


def test_verify_check_value_raises_on_any_difference() -> None:
    key = bytes(range(32))
    value = hazmat.check_value(key, IDENTITY, "station-b")
    hazmat.verify_check_value(key, IDENTITY, "station-b", value)
    wrong = [
        (bytes(32), IDENTITY, "station-b", value),  # another key
        (key, IDENTITY.replace(b"4096", b"4095"), "station-b", value),  # another identity
        (key, IDENTITY, "station-a", value),  # the other station's value (a reflection)
        (key, IDENTITY, "station-b", bytes([value[0] ^ 1]) + value[1:]),  # a flipped bit
    ]
    for case in wrong:
        with pytest.raises(CryptoError):
            hazmat.verify_check_value(*case)
