"""The ledger's canonical form against RFC 8785's own examples, not against the package
that writes it.

The vector files in tests/vectors/rfc8785/ name their source at the top (RFC 8785
Appendix B number samples, section 3.2.2 primitives example, section 3.2.3 sorting
example; recalled from memory and checked against an ECMAScript engine, as each file
says). Each vector drives two checks:

* the service's entry encoding (``keystrata.ledger.entries.encode_entry``) writes the
  expected text for the value, and refuses what RFC 8785 refuses (NaN, Infinity);
* the offline verifier (``keystrata_client.audit``) accepts an entry whose bytes were
  written here by hand with the expected text, and refuses the same value spelled
  another way (not canonical), naming the entry.

When node is on PATH, its JSON.stringify (ECMAScript's Number serialization, RFC 8785
section 3.2.2.3) is run over every number vector as a third, outside opinion.
"""

from __future__ import annotations

import base64
import hashlib
import json
import shutil
import struct
import subprocess
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pymerkle  # type: ignore[import-untyped]
import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from cryptography.hazmat.primitives.serialization import Encoding, PublicFormat

from keystrata.ledger.entries import Event, encode_entry
from keystrata_client.audit import Report, verify_export

VECTORS = Path(__file__).parents[1] / "vectors" / "rfc8785"
NUMBERS = json.loads((VECTORS / "numbers.json").read_text(encoding="utf-8"))
PRIMITIVES = json.loads((VECTORS / "primitives.json").read_text(encoding="utf-8"))
SORTING = json.loads((VECTORS / "sorting.json").read_text(encoding="utf-8"))
AT = datetime(2026, 12, 1, 10, 0, tzinfo=UTC)
KEY = Ed25519PrivateKey.generate()


def double(bits: str) -> float:
    value: float = struct.unpack(">d", bytes.fromhex(bits))[0]  # IEEE 754 binary64
    return value


def b64(raw: bytes) -> str:
    return base64.b64encode(raw).decode()  # RFC 4648 section 4


def entry_with(value_text: str) -> bytes:
    """Entry 0 of relay-vela holding ``value_text`` verbatim as "value", every other
    member written here in RFC 8785 order (names sorted by UTF-16 code units)."""
    return (
        '{"at":"2026-12-01T10:00:00.000000Z","event":"node.initialised","index":0,'
        f'"node":"relay-vela","prev":null,"v":2,"value":{value_text}}}'
    ).encode()


def one_entry_export(folder: Path, raw: bytes) -> Path:
    """An export of one entry, its checkpoint signed here (RFC 8032) over pymerkle's root."""
    root = b64(pymerkle.InmemoryTree.init_from_entries([raw]).get_root(1))
    assert root == b64(hashlib.sha256(b"\x00" + raw).digest())  # RFC 9162: MTH of one leaf
    text = f"relay-vela\n1\n{root}\nkeystrata/v2 signed-at 2026-12-01T10:00:00.000000Z\n"
    public = KEY.public_key().public_bytes(Encoding.Raw, PublicFormat.Raw)
    checkpoint = {"origin": "relay-vela", "tree_size": 1, "root_hash": root, "signed_text": text,
                  "signature": b64(KEY.sign(text.encode())), "public_key": b64(public)}  # fmt: skip
    try:
        decoded: Any = json.loads(raw)
    except ValueError:
        decoded = None
    folder.mkdir()
    line = {"index": 0, "entry_b64": b64(raw), "entry": decoded}
    (folder / "entries.jsonl").write_text(json.dumps(line) + "\n")
    (folder / "checkpoints.jsonl").write_text("")
    (folder / "checkpoint.json").write_text(json.dumps(checkpoint))
    return folder


def verified(tmp_path: Path, name: str, raw: bytes) -> Report:
    return verify_export(one_entry_export(tmp_path / name, raw))


def service_value(value: Any) -> str:
    """The text encode_entry writes for ``value`` (the last member: names sort before it)."""
    raw = encode_entry(
        index=1, event=Event.NODE_INITIALISED, node_id="relay-vela", at=AT,
        fields={"value": value}, prev=b"\x00" * 32,
    ).decode()  # fmt: skip
    head = '"v":2,"value":'
    assert head in raw and raw.endswith("}"), raw
    return raw[raw.index(head) + len(head) : -1]


NUMBER_IDS = [f"{v['bits']}-{v['text'] or 'refused'}" for v in NUMBERS["vectors"]]


@pytest.mark.parametrize("vector", NUMBERS["vectors"], ids=NUMBER_IDS)
def test_number_serialisation(vector: dict[str, Any], tmp_path: Path) -> None:
    value, text = double(vector["bits"]), vector["text"]
    if text is None:  # NaN and Infinity are not JSON numbers (RFC 8785 section 3.2.2.3)
        with pytest.raises(ValueError):
            service_value(value)
        report = verified(tmp_path, "refused", entry_with("NaN" if value != value else "Infinity"))
        assert not report.ok and report.first_bad == 0, report.findings
        return
    assert service_value(value) == text  # RFC 8785 Appendix B
    report = verified(tmp_path, "canonical", entry_with(text))
    assert report.ok, report.findings
    # The same double spelled otherwise (17 significant digits, upper-case exponent) is
    # valid JSON but not canonical: the verifier names the entry.
    other = format(value, ".16E")
    assert other != text and float(other) == value
    report = verified(tmp_path, "other", entry_with(other))
    assert not report.ok and report.first_bad == 0 and "RFC 8785" in report.findings[0]


@pytest.mark.skipif(shutil.which("node") is None, reason="node (an ECMAScript engine) absent")
def test_number_vectors_agree_with_an_ecmascript_engine() -> None:
    script = (
        "const v = JSON.parse(require('fs').readFileSync(0, 'utf8'));"
        "console.log(JSON.stringify(v.map(h => JSON.stringify(Buffer.from(h, 'hex')"
        ".readDoubleBE(0)))));"
    )
    bits = [v["bits"] for v in NUMBERS["vectors"] if v["text"] is not None]
    result = subprocess.run(
        ["node", "-e", script], input=json.dumps(bits), capture_output=True, text=True,
        timeout=30, check=True,
    )  # fmt: skip
    wanted = [v["text"] for v in NUMBERS["vectors"] if v["text"] is not None]
    assert json.loads(result.stdout) == wanted


def test_primitives_example(tmp_path: Path) -> None:
    # RFC 8785 section 3.2.2: numbers, string escapes and literals of the example.
    parsed = json.loads(PRIMITIVES["input_text"])
    assert service_value(parsed) == PRIMITIVES["expected"]
    assert verified(tmp_path, "canonical", entry_with(PRIMITIVES["expected"])).ok
    # Escaping the euro sign, or keeping "4.50", is valid JSON but not canonical.
    escaped = PRIMITIVES["expected"].replace("\u20ac", "\\u20ac")
    kept = PRIMITIVES["expected"].replace(",4.5,", ",4.50,")
    for name, text in (("escaped", escaped), ("kept", kept)):
        assert json.loads(text) == parsed
        report = verified(tmp_path, name, entry_with(text))
        assert not report.ok and "RFC 8785" in report.findings[0], report.findings


def test_sorting_example(tmp_path: Path) -> None:
    # RFC 8785 section 3.2.3: names sorted by UTF-16 code units, so the emoji (a
    # surrogate pair starting 0xD83D) sorts before U+FB33 although its code point is larger.
    parsed = json.loads(SORTING["input_text"])
    written = service_value(parsed)
    assert list(json.loads(written).values()) == SORTING["expected_order"]
    assert verified(tmp_path, "canonical", entry_with(written)).ok
    # Sorted by code points instead (Python's sort_keys): valid JSON, not canonical.
    by_code_point = json.dumps(parsed, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
    assert list(json.loads(by_code_point).values()) != SORTING["expected_order"]
    report = verified(tmp_path, "code-points", entry_with(by_code_point))
    assert not report.ok and "RFC 8785" in report.findings[0], report.findings
