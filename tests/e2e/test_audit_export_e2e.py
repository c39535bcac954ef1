"""The auditor's export over real mutual TLS (`keystrata audit export`), checked by the
offline verifier (`keystrata-ledger-check`); then the stored ledger is tampered with
directly in the database (one byte changed, an entry deleted, two entries swapped) and
the verifier names the entry. On SQLite and PostgreSQL. Both commands keep the auditor's
state (pinned key, last checkpoint seen) in tmp_path, never in the real home folder."""

from __future__ import annotations

import json
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import delete, insert, select, update

from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, prepare_node, run_cli
from keystrata.storage.db import Database
from keystrata.storage.models import LedgerEntry
from keystrata_client import ApiError, OperatorClient, TlsIdentity
from keystrata_client.audit import AuditClient

CHECK = [str(Path(sys.executable).parent / "keystrata-ledger-check")]  # the console script


def _identity(pki: PkiFiles, name: str) -> TlsIdentity:
    return TlsIdentity(ca=pki.ca, cert=pki.cert(name), key=pki.key(name))


@pytest.fixture(autouse=True)
def state(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """The auditor's state folder, for the commands started here (they inherit it)."""
    folder = tmp_path / "auditor-state"
    monkeypatch.setenv("KEYSTRATA_AUDIT_STATE", str(folder))
    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path / "xdg-state"))
    return folder


@pytest.fixture
def node(tmp_path, pki: PkiFiles, db_url: str) -> Iterator[NodeProcess]:
    extra = "\n[ledger]\ncheckpoint_seconds = 0.2\n"
    proc = prepare_node(tmp_path, pki, "station-a", "station", db_url, extra=extra).start(pki)
    try:
        with OperatorClient(proc.url, _identity(pki, "ops-ada")) as ops:
            ops.create(
                "principals",
                {"principal_id": "aud-ben", "role": "auditor", "cert_subject": "aud-ben"},
            )
            for n in range(12):
                ops.create("nodes", {"node_id": f"relay-{n}", "role": "relay"})
        _wait_for_checkpoint(proc.url, _identity(pki, "aud-ben"))
        yield proc
    finally:
        proc.stop()


def _wait_for_checkpoint(url: str, me: TlsIdentity) -> None:
    """Until a checkpoint covers every entry (it stops moving)."""
    with AuditClient(url, me) as client:
        seen, since = -1, time.monotonic()
        deadline = since + 20
        while time.monotonic() < deadline:
            try:
                size = int(client.latest_checkpoint()["tree_size"])
            except ApiError:  # 404 until the first checkpoint is signed
                size = -1
            if size != seen:
                seen, since = size, time.monotonic()
            elif size > 0 and time.monotonic() - since > 1.0:
                return
            time.sleep(0.1)
    raise AssertionError("no stable checkpoint")


def _export(node: NodeProcess, pki: PkiFiles, out: Path) -> subprocess.CompletedProcess[str]:
    return run_cli(
        "audit", "export", "--url", node.url, "--ca", str(pki.ca),
        "--cert", str(pki.cert("aud-ben")), "--key", str(pki.key("aud-ben")),
        "--out", str(out), check=False,
    )  # fmt: skip


def _check(folder: Path) -> tuple[int, dict]:
    result = subprocess.run(
        [*CHECK, str(folder), "--json"], capture_output=True, text=True, timeout=60
    )
    return result.returncode, json.loads(result.stdout)


def test_export_verifies_and_tampering_is_named(node, pki, db_url, tmp_path, state) -> None:
    good = _export(node, pki, tmp_path / "good")
    assert good.returncode == 0, good.stdout + good.stderr
    code, report = _check(tmp_path / "good")
    assert code == 0 and report["ok"], report
    # The first export pinned the node's key (printed) and kept its checkpoint.
    with AuditClient(node.url, _identity(pki, "aud-ben")) as client:
        served = client.latest_checkpoint()
    assert f"pinned in {state}" in good.stdout and served["public_key"] in good.stdout
    kept = json.loads((state / "station-a.json").read_text())
    assert kept["public_key"] == served["public_key"] == report["public_key"]
    assert kept["checkpoint"]["tree_size"] == report["tree_size"]
    assert report["pinning"] == "pinned" and report["signed_at"] is not None
    lines = (tmp_path / "good" / "entries.jsonl").read_text().splitlines()
    size = len(lines)
    assert size == report["tree_size"] > 12
    # The verifier pins nothing here; pinning the node's key is the auditor's choice.
    checkpoint = json.loads((tmp_path / "good" / "checkpoint.json").read_text())
    assert set(checkpoint) == {
        "origin", "tree_size", "root_hash", "signed_text", "signature", "public_key"
    }  # fmt: skip

    db = Database.from_url(db_url)
    with db.read() as s:
        stored = dict(s.execute(select(LedgerEntry.idx, LedgerEntry.entry)).all())
    rows = _rows(db)  # whole rows, to put the ledger back after each change
    assert len(rows) == size

    def tampered(name: str, change) -> dict:
        with db.write() as s:
            change(s)
        out = tmp_path / name
        result = _export(node, pki, out)
        assert result.returncode == 1, result.stdout  # the export's own check fails too
        code, report = _check(out)
        assert code == 1 and not report["ok"]
        with db.write() as s:  # put the ledger back as it was
            s.execute(delete(LedgerEntry))
            s.execute(insert(LedgerEntry), rows)
        return report

    def one_byte(index: int, old: bytes, new: bytes):
        entry = bytes(stored[index])
        assert entry.count(old) >= 1
        changed = entry.replace(old, new, 1)
        assert sum(a != b for a, b in zip(entry, changed, strict=True)) == 1
        return lambda s: s.execute(
            update(LedgerEntry).where(LedgerEntry.idx == index).values(entry=changed)
        )

    middle = size // 2
    # A byte of a name inside the entry: still valid, canonical JSON.
    assert tampered("name", one_byte(middle, b'"relay-', b'"relax-'))["first_bad"] == middle
    # A byte that breaks the JSON.
    assert tampered("syntax", one_byte(middle, b'"v":2', b'"v"!2'))["first_bad"] == middle
    # The last entry has no successor to vouch for it: the signed root does.
    assert tampered("last", one_byte(size - 1, b'"v":2', b'"v":3'))["first_bad"] == size - 1
    deleted = tampered(
        "deleted", lambda s: s.execute(delete(LedgerEntry).where(LedgerEntry.idx == 4))
    )
    assert deleted["first_bad"] == 4

    def swap(s) -> None:
        for a, b in ((3, 5), (5, 3)):
            s.execute(update(LedgerEntry).where(LedgerEntry.idx == a).values(entry=stored[b]))

    assert tampered("swapped", swap)["first_bad"] == 3
    db.dispose()
    # The state kept the good checkpoint through the refused exports; the ledger as it
    # was, grown by new entries, is consistent with it.
    assert json.loads((state / "station-a.json").read_text()) == kept
    with OperatorClient(node.url, _identity(pki, "ops-ada")) as ops:
        ops.create("nodes", {"node_id": "relay-late", "role": "relay"})
    _wait_for_checkpoint(node.url, _identity(pki, "aud-ben"))
    later = _export(node, pki, tmp_path / "later")
    assert later.returncode == 0, later.stdout + later.stderr
    assert "consistent with the last checkpoint seen" in later.stdout
    code, report = _check(tmp_path / "later")
    assert code == 0 and report["tree_size"] > size
    assert "the same tree as the last checkpoint seen" in report["notes"]


def _rows(db: Database) -> list[dict]:
    with db.read() as s:
        return [
            {"idx": r.idx, "recorded_at": r.recorded_at, "event": r.event, "entry": r.entry}
            for r in s.execute(select(LedgerEntry).order_by(LedgerEntry.idx)).scalars()
        ]


def test_search_and_accounting_from_the_cli(node, pki) -> None:
    conn = [
        "--url", node.url, "--ca", str(pki.ca),
        "--cert", str(pki.cert("aud-ben")), "--key", str(pki.key("aud-ben")),
    ]  # fmt: skip
    found = json.loads(
        run_cli("audit", "search", "--event", "registry.created", "--node", "relay-3",
                "--json", *conn).stdout
    )  # fmt: skip
    assert [e["entry"]["id"] for e in found] == ["relay-3"]
    table = run_cli("audit", "search", "--event", "registry.created", *conn).stdout
    assert "registry.created" in table
    bad = run_cli("audit", "search", "--since", "yesterday", *conn, check=False)
    assert bad.returncode != 0 and "since" in bad.stderr
    csv_out = run_cli("audit", "accounting", "--csv", *conn).stdout
    assert csv_out == ""  # no key delivered on this node yet: no rows
