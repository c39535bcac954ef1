"""The auditor's offline ledger verifier (``keystrata_client.audit``), its RFC 9162 tree
code, its export client and ``keystrata-ledger-check``.

Exports are built here by an independent writer (no server, no code shared with the
verifier): entries are RFC 8785 canonical JSON made with the ``rfc8785`` package, chained
by ``prev`` = Base64 of SHA-256(0x00 || previous entry) written out with ``hashlib``;
tree roots come from ``pymerkle`` (PyPI; its default tree uses the RFC 9162 prefixes);
checkpoints are signed with an Ed25519 key from ``cryptography``. Tampering is done to the
stored bytes, as an attacker with the database would, and the export then shows what a
node would serve for them.

Outside references, each named beside its check:

* RFC 9162 section 2.1 (MTH, PATH, PROOF): roots and audit paths against pymerkle 7;
  consistency proofs against a naive recursive PROOF written here from the RFC text.
* RFC 8032 section 7.1 TEST 1 (Ed25519): the vector file tests/vectors/rfc8032_ed25519.json
  (recalled from memory, cross-checked there against cryptography_vectors).
* RFC 8785: canonical bytes from the ``rfc8785`` package.
* RFC 4648: Base64 from the standard library.
* C2SP tlog checkpoint body (origin, size, Base64 root, each on a line, then optional
  extension lines): from memory, as the server documents it; the extension line
  ``keystrata/v2 signed-at <time>`` is ours, the time RFC 3339 section 5.6 in UTC.
"""

from __future__ import annotations

import base64
import hashlib
import json
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from functools import cache
from pathlib import Path
from typing import Any
from urllib.parse import parse_qs, urlparse

import httpx
import pymerkle  # type: ignore[import-untyped]
import pytest
import rfc8785
from click.testing import CliRunner
from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from cryptography.hazmat.primitives.serialization import Encoding, PublicFormat

from keystrata_client import KeystrataClientError
from keystrata_client.audit import AuditClient, Report, verify_export, write_export
from keystrata_client.audit._tree import (
    LeafTable,
    ProofError,
    leaf_hash,
    mth,
    verify_consistency,
    verify_inclusion,
)
from keystrata_client.audit.cli import main as cli_main
from keystrata_client.audit.verify import verify_signature

ORIGIN = "relay-vela"
EVENTS = (
    "node.initialised",
    "registry.created",
    "link_key.ingested",
    "relay.segment_made",
    "segment.ready",
    "key.allocated",
    "key.delivered",
)
VECTORS = Path(__file__).parents[1] / "vectors"


def b64(raw: bytes) -> str:
    return base64.b64encode(raw).decode()  # RFC 4648 section 4


# ---------------------------------------------------------------- independent writer


def make_entries(n: int, *, version: int = 2, tag: str = "") -> list[bytes]:
    """Ledger entries 0..n-1 in the node's format: RFC 8785 JSON, v2 chained by prev."""
    out: list[bytes] = []
    prev: str | None = None
    for i in range(n):
        body: dict[str, Any] = {
            "v": version,
            "index": i,
            "event": EVENTS[0] if i == 0 else EVENTS[1 + i % (len(EVENTS) - 1)],
            "node": ORIGIN,
            "at": f"2026-12-01T{10 + i // 3600:02d}:{i // 60 % 60:02d}:{i % 60:02d}.000000Z",
            "station": ("karsvik", "tollmere", "brenhaven")[i % 3],
            "bits": 1000 + 7 * i,
            "actor": "ops-ida-varga" + tag,
        }
        if version == 2:
            body["prev"] = prev
        raw = rfc8785.dumps(body)
        out.append(raw)
        # RFC 9162 section 2.1.1 leaf hash, written here with hashlib.
        prev = b64(hashlib.sha256(b"\x00" + raw).digest())
    return out


@cache
def tree_of(entries: tuple[bytes, ...]) -> Any:
    return pymerkle.InmemoryTree.init_from_entries(list(entries))


@cache
def node_key(name: str = "relay-vela") -> Ed25519PrivateKey:
    return Ed25519PrivateKey.generate()


def raw_public(key: Ed25519PrivateKey) -> bytes:
    return key.public_key().public_bytes(Encoding.Raw, PublicFormat.Raw)


def checkpoint(
    entries: Sequence[bytes],
    size: int,
    key: Ed25519PrivateKey | None = None,
    *,
    time_line: str | None = None,
) -> dict[str, Any]:
    """A checkpoint of the first ``size`` entries, root from pymerkle, signed (RFC 8032);
    version 1 (no time) unless a ``time_line`` is given (without its newline)."""
    key = key or node_key()
    root = b64(tree_of(tuple(entries)).get_root(size))
    text = f"{ORIGIN}\n{size}\n{root}\n" + ("" if time_line is None else time_line + "\n")
    return {
        "origin": ORIGIN,
        "tree_size": size,
        "root_hash": root,
        "signed_text": text,
        "signature": b64(key.sign(text.encode())),
        "public_key": b64(raw_public(key)),
    }


def served(index: int, raw: bytes) -> dict[str, Any]:
    """What a node serves for a stored row: the decoding is null for bytes not JSON."""
    try:
        entry = json.loads(raw)
    except ValueError:
        entry = None
    return {"index": index, "entry_b64": b64(raw), "entry": entry}


Rows = list[tuple[int, bytes]]


def rows_of(entries: Sequence[bytes]) -> Rows:
    return list(enumerate(entries))


def write_dir(
    folder: Path,
    rows: Rows,
    latest: dict[str, Any],
    history: Sequence[dict[str, Any]] = (),
) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    lines = [json.dumps(served(i, raw)) + "\n" for i, raw in rows]
    (folder / "entries.jsonl").write_text("".join(lines))
    (folder / "checkpoint.json").write_text(json.dumps(latest))
    (folder / "checkpoints.jsonl").write_text("".join(json.dumps(c) + "\n" for c in history))
    return folder


@dataclass
class Export:
    entries: list[bytes]
    folder: Path
    latest: dict[str, Any]
    history: list[dict[str, Any]] = field(default_factory=list)

    def with_rows(self, rows: Rows, name: str = "tampered") -> Path:
        """The export a node would serve after its rows became ``rows``."""
        return write_dir(self.folder.parent / name, rows, self.latest, self.history)


@pytest.fixture(autouse=True)
def _auditor_state(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The commands keep their state in tmp_path, never in the real home folder."""
    monkeypatch.setenv("KEYSTRATA_AUDIT_STATE", str(tmp_path / "auditor-state"))
    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path / "xdg-state"))


@pytest.fixture
def export(tmp_path: Path) -> Callable[..., Export]:
    def make(n: int, *, version: int = 2, history: Sequence[int] = ()) -> Export:
        entries = make_entries(n, version=version)
        latest = checkpoint(entries, n)
        past = [checkpoint(entries, m) for m in history]
        folder = write_dir(tmp_path / f"export-{n}-v{version}", rows_of(entries), latest, past)
        return Export(entries, folder, latest, past)

    return make


def digit_changed(raw: bytes) -> bytes:
    """One byte changed, the JSON still valid and canonical: a digit of ``bits``."""
    at = raw.index(b'"bits":') + len(b'"bits":')
    out = bytearray(raw)
    out[at] = ord(str(int(chr(out[at])) % 9 + 1))
    assert out != raw and json.loads(out)["bits"] != json.loads(raw)["bits"]
    return bytes(out)


def json_broken(raw: bytes) -> bytes:
    """One byte changed so that the bytes are no longer JSON."""
    out = bytearray(raw)
    out[0] = ord("[")
    return bytes(out)


def bad(report: Report, index: int | None, *words: str) -> None:
    assert not report.ok
    assert report.first_bad == index, report.findings
    text = " ".join(report.findings)
    for word in words:
        assert word in text, report.findings
    if index is not None:
        assert f"entry {index}" in report.findings[0]


# ---------------------------------------------------------------- good exports


@pytest.mark.parametrize("n", [1, 2, 7, 1000])
def test_good_export_verifies(export: Callable[..., Export], n: int) -> None:
    history = sorted({1, (n + 1) // 2, n})
    ex = export(n, history=history)
    report = verify_export(
        ex.folder,
        public_key=raw_public(node_key()),
        earlier=[checkpoint(ex.entries, m) for m in sorted({1, n // 3 or 1})],
        check_index=n // 2,
    )
    assert report.ok, report.findings
    assert (report.origin, report.tree_size, report.entries, report.first_bad) == (
        ORIGIN,
        n,
        n,
        None,
    )
    # The root is pymerkle's root of the n entries (RFC 9162 section 2.1.1).
    assert report.root == b64(tree_of(tuple(ex.entries)).get_root(n))
    expected: dict[str, int] = {}
    for raw in ex.entries:
        event = json.loads(raw)["event"]
        expected[event] = expected.get(event, 0) + 1
    assert report.events == expected
    assert any("pinned" in note for note in report.notes)
    assert any(f"entry {n // 2}" in note and "audit path" in note for note in report.notes)
    if n > 1:
        assert any("consistent with the latest" in note for note in report.notes)


def test_unpinned_key_is_said(export: Callable[..., Export]) -> None:
    report = verify_export(export(5).folder)
    assert report.ok
    assert any("NOT pinned" in note and report.public_key in note for note in report.notes)
    assert report.public_key == b64(raw_public(node_key()))


def test_v1_entries_verify_and_say_they_have_no_chain(export: Callable[..., Export]) -> None:
    report = verify_export(export(9, version=1).folder)
    assert report.ok, report.findings
    assert any("9 v1 entries carry no prev" in note for note in report.notes)


def test_v1_then_v2_entries_verify(tmp_path: Path) -> None:
    # A ledger whose entries start in format 1 and go on in format 2: the first format-2
    # entry records the leaf hash of the last v1 entry.
    old = make_entries(4, version=1)
    body = json.loads(make_entries(6)[5])
    new = []
    for i in range(4, 8):
        body = {**body, "index": i, "prev": b64(leaf_hash((old + new)[-1]))}
        new.append(rfc8785.dumps(body))
    entries = old + new
    folder = write_dir(tmp_path / "mixed", rows_of(entries), checkpoint(entries, 8))
    report = verify_export(folder)
    assert report.ok, report.findings
    assert any("from entry 4 to 7" in note for note in report.notes)
    # A v1 entry after v2 ones is refused: the format never goes back.
    back = [*entries, make_entries(9, version=1)[8]]
    folder = write_dir(tmp_path / "back", rows_of(back), checkpoint(back, 9))
    bad(verify_export(folder), 8, "v1 entry after v2")


# ---------------------------------------------------------------- altered entries


@pytest.mark.parametrize("change", [digit_changed, json_broken], ids=["digit", "json"])
@pytest.mark.parametrize("where", ["first", "middle", "before_last", "last"])
def test_one_altered_byte_names_the_entry(
    export: Callable[..., Export], change: Callable[[bytes], bytes], where: str
) -> None:
    ex = export(20, history=[5, 10, 20])
    index = {"first": 0, "middle": 9, "before_last": 18, "last": 19}[where]
    rows = rows_of(ex.entries)
    rows[index] = (index, change(ex.entries[index]))
    report = verify_export(ex.with_rows(rows))
    words = ["not valid JSON"] if change is json_broken else []
    if change is digit_changed and index == 19:
        words = ["last entry or the checkpoint differs"]
    elif change is digit_changed:
        words = [f"entry {index + 1} recorded another hash"]
    bad(report, index, *words)
    # No entry's content is printed: only index, event and reason.
    assert all("ops-ida-varga" not in f and "karsvik" not in f for f in report.findings)


def test_altered_prev_field_names_its_entry(export: Callable[..., Export]) -> None:
    ex = export(12)
    body = json.loads(ex.entries[6])
    body["prev"] = b64(hashlib.sha256(b"something else").digest())
    rows = rows_of(ex.entries)
    rows[6] = (6, rfc8785.dumps(body))
    bad(verify_export(ex.with_rows(rows)), 6, "its prev does not match entry 5")


def test_non_canonical_bytes_are_named(export: Callable[..., Export]) -> None:
    ex = export(6)
    rows = rows_of(ex.entries)
    rows[3] = (3, json.dumps(json.loads(ex.entries[3]), indent=1).encode())  # valid JSON
    bad(verify_export(ex.with_rows(rows)), 3, "RFC 8785")


def test_export_whose_decoded_entry_disagrees_is_named(export: Callable[..., Export]) -> None:
    ex = export(6)
    folder = ex.folder
    lines = (folder / "entries.jsonl").read_text().splitlines()
    record = json.loads(lines[2])
    record["entry"]["bits"] += 1
    lines[2] = json.dumps(record)
    (folder / "entries.jsonl").write_text("\n".join(lines) + "\n")
    bad(verify_export(folder), 2, "decoded entry differs")


def test_v1_alteration_is_found_and_placed_by_checkpoints(export: Callable[..., Export]) -> None:
    # Without a chain the root still refuses the export; checkpoints at every size name
    # the entry, checkpoints further apart give the range it lies in.
    ex = export(12, version=1, history=range(1, 13))
    rows = rows_of(ex.entries)
    rows[7] = (7, digit_changed(ex.entries[7]))
    bad(
        verify_export(ex.with_rows(rows)), 7, "root of the entries differs", "the one of 8 does not"
    )
    ex.history[:] = [checkpoint(ex.entries, m) for m in (4, 10)]
    report = verify_export(ex.with_rows(rows, "sparse"))
    bad(report, None, "root of the entries differs")
    assert any("at or after entry 4 and before entry 10" in note for note in report.notes)


# ---------------------------------------------------------------- missing and moved entries


def test_deleted_entry_names_the_gap(export: Callable[..., Export]) -> None:
    ex = export(30)
    rows = [r for r in rows_of(ex.entries) if r[0] != 13]  # the row is gone from the table
    bad(verify_export(ex.with_rows(rows)), 13, "missing", "holds entry 14")


def test_deleted_entry_with_renumbered_export_lines(export: Callable[..., Export]) -> None:
    # Someone removed a line from the export and renumbered the lines: the entries' own
    # index still tells.
    ex = export(30)
    rows = [(i, raw) for i, raw in enumerate(e for e in ex.entries if e != ex.entries[13])]
    bad(verify_export(ex.with_rows(rows)), 13, "says entry 14")


def test_deleted_last_entry_is_missing_from_the_checkpoint(export: Callable[..., Export]) -> None:
    ex = export(30)
    bad(verify_export(ex.with_rows(rows_of(ex.entries[:29]))), 29, "missing")


def test_swapped_entries_name_the_position(export: Callable[..., Export]) -> None:
    ex = export(30)
    rows = rows_of(ex.entries)
    rows[4], rows[11] = (4, ex.entries[11]), (11, ex.entries[4])
    bad(verify_export(ex.with_rows(rows)), 4, "says entry 11")
    # The export's lines themselves out of order.
    rows = rows_of(ex.entries)
    rows[4], rows[11] = rows[11], rows[4]
    bad(verify_export(ex.with_rows(rows, "lines")), 4, "holds entry 11")


# ---------------------------------------------------------------- checkpoints


def test_bad_signature_is_refused(export: Callable[..., Export]) -> None:
    ex = export(8)
    signature = bytearray(base64.b64decode(ex.latest["signature"]))
    signature[10] ^= 0x01
    (ex.folder / "checkpoint.json").write_text(
        json.dumps({**ex.latest, "signature": b64(bytes(signature))})
    )
    bad(verify_export(ex.folder), None, "signature does not verify")


def test_wrong_pinned_key_is_refused(export: Callable[..., Export]) -> None:
    ex = export(8)
    other = raw_public(node_key("someone else"))
    bad(verify_export(ex.folder, public_key=other), None, "another key than the pinned key")


def test_checkpoint_signed_with_another_key_is_refused(export: Callable[..., Export]) -> None:
    ex = export(8)
    forged = checkpoint(ex.entries, 8, node_key("forger"))
    (ex.folder / "checkpoint.json").write_text(json.dumps(forged))
    assert verify_export(ex.folder).ok  # self-consistent: only pinning the key tells
    bad(verify_export(ex.folder, public_key=raw_public(node_key())), None, "pinned key")


def test_signed_text_must_match_fields(export: Callable[..., Export]) -> None:
    ex = export(8)
    (ex.folder / "checkpoint.json").write_text(json.dumps({**ex.latest, "tree_size": 7}))
    bad(verify_export(ex.folder), None, "signed_text does not match")


def test_checkpoint_beyond_the_entries_is_refused(export: Callable[..., Export]) -> None:
    ex = export(10)
    longer = make_entries(11)
    (ex.folder / "checkpoint.json").write_text(json.dumps(checkpoint(longer, 11)))
    bad(verify_export(ex.folder), 10, "signs 11 entries but the export holds 10")


def test_earlier_checkpoint_must_be_a_prefix(export: Callable[..., Export]) -> None:
    ex = export(20)
    fork = make_entries(20, tag=" (rewritten)")
    report = verify_export(ex.folder, earlier=[checkpoint(fork, 6)])
    bad(report, None, "earlier checkpoint 1", "signs other entries than the first 6")
    # A checkpoint larger than today's: the ledger was rolled back.
    rolled = verify_export(ex.folder, earlier=[checkpoint(make_entries(25), 25)])
    bad(rolled, None, "rolled back")
    # The node's own history in the export is checked the same way.
    (ex.folder / "checkpoints.jsonl").write_text(json.dumps(checkpoint(fork, 6)) + "\n")
    bad(verify_export(ex.folder), None, "checkpoints.jsonl line 1")


def test_untimed_checkpoint_is_read_as_no_time(export: Callable[..., Export]) -> None:
    report = verify_export(export(4).folder)
    assert report.ok and report.signed_at is None
    assert any("no signing time (format version 1)" in note for note in report.notes)


@pytest.mark.parametrize(
    ("line", "signed_at"),
    [
        ("keystrata/v2 signed-at 2026-12-01T10:00:00.000000Z", "2026-12-01T10:00:00.000000Z"),
        ("keystrata/v2 signed-at 2026-12-01T10:00:00Z", "2026-12-01T10:00:00.000000Z"),
        ("keystrata/v2 signed-at 2026-12-01T10:00:00.5Z", "2026-12-01T10:00:00.500000Z"),
        # Malformed: an offset instead of Z, no seconds, a 13th month, a leap second (RFC
        # 3339 section 5.6 allows second 60; this verifier does not take it), lower-case t.
        ("keystrata/v2 signed-at 2026-12-01T10:00:00+00:00", None),
        ("keystrata/v2 signed-at 2026-12-01T10:00Z", None),
        ("keystrata/v2 signed-at 2026-13-01T10:00:00Z", None),
        ("keystrata/v2 signed-at 2026-12-31T23:59:60Z", None),
        ("keystrata/v2 signed-at 2026-12-01t10:00:00Z", None),
        ("keystrata/v3 signed-at 2026-12-01T10:00:00Z", None),  # unknown version
        ("extension from elsewhere", None),
        ("keystrata/v2 signed-at 2026-12-01T10:00:00Z\nmore", None),
    ],
)
def test_time_line_of_the_signed_text(
    export: Callable[..., Export], line: str, signed_at: str | None
) -> None:
    ex = export(6)
    cp = checkpoint(ex.entries, 6, time_line=line)
    (ex.folder / "checkpoint.json").write_text(json.dumps(cp))
    report = verify_export(ex.folder)
    if signed_at is None:
        bad(report, None, "checkpoint.json")
        assert any(w in report.findings[0] for w in ("signing time", "unknown", "does not know")), (
            report.findings
        )
    else:
        assert report.ok, report.findings
        assert report.signed_at == signed_at


def test_rfc8032_test1_signature_is_accepted() -> None:
    # RFC 8032 section 7.1 TEST 1 (the vector file says how it was obtained).
    vectors = json.loads((VECTORS / "rfc8032_ed25519.json").read_text())["vectors"]
    test1 = next(v for v in vectors if v["name"] == "TEST 1")
    public = bytes.fromhex(test1["public_key"])
    signature = bytes.fromhex(test1["signature"])
    message = bytes.fromhex(test1["message"])
    assert message == b""
    verify_signature(public, signature, message)
    with pytest.raises(InvalidSignature):
        verify_signature(public, signature[:-1] + bytes([signature[-1] ^ 1]), message)
    with pytest.raises(InvalidSignature):
        verify_signature(public, signature, b"\x00")


# ---------------------------------------------------------------- RFC 9162 tree code


def _k(n: int) -> int:
    k = 1
    while k * 2 < n:
        k *= 2
    return k


def naive_proof(m: int, entries: Sequence[bytes], whole: bool = True) -> list[bytes]:
    """SUBPROOF(m, D[n], b) of RFC 9162 section 2.1.4.1, by brute force over entries."""
    n = len(entries)
    if m == n:
        return [] if whole else [mth(entries)]
    k = _k(n)
    if m <= k:
        return [*naive_proof(m, entries[:k], whole), mth(entries[k:])]
    return [*naive_proof(m - k, entries[k:], False), mth(entries[:k])]


def table_of(entries: Sequence[bytes]) -> LeafTable:
    table = LeafTable()
    for raw in entries:
        table.append(leaf_hash(raw))
    return table


def flipped(value: bytes) -> bytes:
    return bytes([value[0] ^ 0x80]) + value[1:]


@pytest.mark.parametrize("n", [*range(1, 34), 64, 100, 255, 256, 257, 1000])
def test_roots_and_audit_paths_equal_pymerkle(n: int) -> None:
    entries = [b"leaf %d" % i for i in range(n)]
    table, theirs = table_of(entries), tree_of(tuple(entries))
    assert table.root() == theirs.get_root() == mth(entries)
    for m in {1, n // 2, n - 1, n} - {0}:
        assert table.root(m) == theirs.get_root(m)
    for i in range(n) if n <= 64 else (0, 1, n // 2, n - 2, n - 1):
        path = table.inclusion_path(i, n)
        # pymerkle's path starts with the leaf itself and counts leaves from 1.
        assert path == theirs.prove_inclusion(i + 1, n).path[1:]
        verify_inclusion(leaf_hash(entries[i]), i, n, path, table.root())
        wrongs = [[*path, path[-1]], path[:-1], [*path[:-1], flipped(path[-1])]] if path else []
        for wrong in [*wrongs, [b"\x00" * 32, *path]]:
            with pytest.raises(ProofError):
                verify_inclusion(leaf_hash(entries[i]), i, n, wrong, table.root())
        with pytest.raises(ProofError):
            verify_inclusion(leaf_hash(b"other"), i, n, path, table.root())


def test_consistency_proofs_match_the_rfc_and_modified_ones_fail() -> None:
    entries = [b"e%d" % i for i in range(40)]
    table = table_of(entries)
    for n in range(1, 41):
        new_root = mth(entries[:n])
        for m in range(1, n + 1):
            old_root = mth(entries[:m])
            proof = table.consistency_proof(m, n)
            assert proof == naive_proof(m, entries[:n])  # RFC 9162 section 2.1.4.1
            verify_consistency(m, n, old_root, new_root, proof)  # section 2.1.4.2
            wrong: list[list[bytes]] = [
                [*proof[:j], flipped(p), *proof[j + 1 :]] for j, p in enumerate(proof)
            ]
            wrong += [[*proof, new_root]]
            if proof:
                wrong += [proof[:-1], proof[1:]]
            for modified in wrong:
                with pytest.raises(ProofError):
                    verify_consistency(m, n, old_root, new_root, modified)
            with pytest.raises(ProofError):
                verify_consistency(m, n, flipped(old_root), new_root, proof)
            if m < n:
                with pytest.raises(ProofError):
                    verify_consistency(m, n, old_root, flipped(new_root), proof)
                with pytest.raises(ProofError):
                    verify_consistency(m + 1, n, mth(entries[: m + 1]), new_root, proof)
        # pymerkle's own verifier agrees that our roots are consistent.
        theirs = tree_of(tuple(entries))
        for m in (1, n // 2 or 1, n):
            pymerkle.verify_consistency(
                table.root(m), table.root(n), theirs.prove_consistency(m, n)
            )
    with pytest.raises(ProofError):
        verify_consistency(0, 5, mth([]), mth(entries[:5]), [])


# ---------------------------------------------------------------- the command


def run(*args: str) -> Any:
    return CliRunner().invoke(cli_main, [str(a) for a in args])


def test_cli_exit_codes(export: Callable[..., Export], tmp_path: Path) -> None:
    ex = export(9, history=[3, 9])
    key = b64(raw_public(node_key()))
    good = run(ex.folder, "--public-key", key, "--entry", "4")
    assert good.exit_code == 0, good.output
    assert "VERIFIED" in good.output and "tree size      9" in good.output

    pem = tmp_path / "node.pub"
    pem.write_bytes(
        node_key().public_key().public_bytes(Encoding.PEM, PublicFormat.SubjectPublicKeyInfo)
    )
    saved = tmp_path / "saved-checkpoint.json"
    saved.write_text(json.dumps(checkpoint(ex.entries, 5)))
    assert run(ex.folder, "--public-key", pem, "--earlier", saved).exit_code == 0

    answer = run(ex.folder, "--json")
    assert answer.exit_code == 0 and json.loads(answer.output)["ok"] is True

    rows = rows_of(ex.entries)
    rows[4] = (4, digit_changed(ex.entries[4]))
    tampered = run(ex.with_rows(rows))
    assert tampered.exit_code == 1
    assert "FAILED: first bad entry 4" in tampered.output
    assert json.loads(run(ex.with_rows(rows, "t2"), "--json").output)["first_bad"] == 4
    fork = tmp_path / "fork.json"
    fork.write_text(json.dumps(checkpoint(make_entries(9, tag="x"), 5)))
    assert run(ex.folder, "--earlier", fork).exit_code == 1
    other = b64(raw_public(node_key("someone else")))
    assert run(ex.folder, "--public-key", other).exit_code == 1

    # Usage errors: 2.
    assert run(tmp_path / "nowhere").exit_code == 2
    empty = tmp_path / "empty"
    empty.mkdir()
    missing = run(empty)
    assert missing.exit_code == 2 and "entries.jsonl" in missing.output
    assert run(ex.folder, "--public-key", "not-a-key").exit_code == 2
    assert run(ex.folder, "--entry", "9").exit_code == 2
    not_json = tmp_path / "junk.json"
    not_json.write_text("{{")
    assert run(ex.folder, "--earlier", not_json).exit_code == 2


# ---------------------------------------------------------------- the export client


@dataclass
class FakeNode:
    """The auditor routes answered from rows in memory, with the node's paging rules."""

    rows: Rows
    checkpoints: list[dict[str, Any]]  # by tree size
    latest: dict[str, Any]
    asked: list[str] = field(default_factory=list)

    def __call__(self, request: httpx.Request) -> httpx.Response:
        url = urlparse(str(request.url))
        query = {k: int(v[0]) for k, v in parse_qs(url.query).items()}
        self.asked.append(url.path + ("?" + url.query if url.query else ""))
        if url.path == "/api/v1/audit/checkpoints/latest":
            return httpx.Response(200, json={**self.latest, "signed_at": "2026-12-01T10:00:00"})
        if url.path == "/api/v1/audit/checkpoints":
            before = query.get("before", 2**62)
            found = [c for c in self.checkpoints if c["tree_size"] < before][::-1]
            return httpx.Response(200, json={"checkpoints": found[: query.get("limit", 100)]})
        if url.path == "/api/v1/audit/entries":
            start = query.get("start", 0)
            end = min(query.get("end", start + 1000), start + 1000)
            page = [served(i, raw) for i, raw in self.rows if start <= i < end]
            return httpx.Response(200, json={"entries": page})
        return httpx.Response(404, json={"message": "no route"})


@pytest.fixture
def fake_node() -> Iterator[Callable[[FakeNode], AuditClient]]:
    clients: list[httpx.Client] = []

    def make(node: FakeNode) -> AuditClient:
        http = httpx.Client(transport=httpx.MockTransport(node))
        clients.append(http)
        return AuditClient("https://relay-vela.test:8443/", client=http)

    yield make
    for http in clients:
        http.close()


def test_write_export_pages_and_stops_at_the_checkpoint(
    fake_node: Callable[[FakeNode], AuditClient], tmp_path: Path
) -> None:
    entries = make_entries(2300)
    # 1100 checkpoints up to the latest (two pages of them) and one signed afterwards.
    history = [checkpoint(entries, m) for m in [*range(1, 1101), 2100, 2300]]
    node = FakeNode(rows_of(entries), history, history[-2])
    out = tmp_path / "export"
    summary = write_export(fake_node(node), out)
    assert (summary.tree_size, summary.entries, summary.checkpoints) == (2100, 2100, 1101)
    # The checkpoint came first, then entries [0, 2100) in pages of at most 1000.
    assert node.asked[0] == "/api/v1/audit/checkpoints/latest"
    assert node.asked[1:4] == [
        f"/api/v1/audit/entries?start={a}&end={b}"
        for a, b in ((0, 1000), (1000, 2000), (2000, 2100))
    ]
    assert sorted(p.name for p in out.iterdir()) == [
        "checkpoint.json",
        "checkpoints.jsonl",
        "entries.jsonl",
    ]
    lines = (out / "entries.jsonl").read_text().splitlines()
    assert [json.loads(line)["index"] for line in lines] == list(range(2100))
    assert json.loads((out / "checkpoint.json").read_text()) == history[-2]  # six keys
    kept = [json.loads(line) for line in (out / "checkpoints.jsonl").read_text().splitlines()]
    assert kept == history[:-1]
    report = verify_export(out, public_key=raw_public(node_key()))
    assert report.ok and report.tree_size == 2100, report.findings

    # A folder that holds anything is refused unless told to overwrite.
    with pytest.raises(FileExistsError):
        write_export(fake_node(node), out)
    node.rows = [r for r in node.rows if r[0] != 1500]  # a row went missing meanwhile
    summary = write_export(fake_node(node), out, overwrite=True)
    assert summary.entries == 2099
    assert not [p for p in out.iterdir() if p.name.endswith(".tmp")]
    bad(verify_export(out), 1500, "missing")


def test_write_export_refuses_a_confused_answer(tmp_path: Path) -> None:
    entries = make_entries(5)
    latest = checkpoint(entries, 5)

    def confused(request: httpx.Request) -> httpx.Response:
        if request.url.path.endswith("/checkpoints/latest"):
            return httpx.Response(200, json=latest)
        # Entries outside the window asked for, as no node would send them.
        return httpx.Response(200, json={"entries": [served(0, entries[0]), served(7, b"{}")]})

    with (
        httpx.Client(transport=httpx.MockTransport(confused)) as http,
        pytest.raises(KeystrataClientError, match=r"outside \[0, 5\)"),
    ):
        write_export(AuditClient("https://relay-vela.test", client=http), tmp_path / "x")
    assert [p.name for p in (tmp_path / "x").iterdir()] == []  # nothing half-written
