"""`keystrata audit reconcile` on real exports of a running network (a relay and two
stations, `keystrata serve` processes on SQLite, mutual TLS on loopback).

Keys delivered both ways reconcile; keys the owner allocated while the other station's
export was taken are "in flight", keys allocated after the earlier export "later", and
neither fails the run (exit 0). A key removed from one side's entries (as if its row
were lost) is still "one sided" and fails.
"""

from __future__ import annotations

import json
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from e2enet import add_auditor, quiet, stock_and_stop
from helpers import on_a_terminal
from keystrata.loopback.network import NETWORK, PAIR, feed_links, start_network
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, run_cli, stop_all
from keystrata_client import ApiError, OperatorClient
from keystrata_client.audit import AuditClient
from keystrata_client.audit.reconcile import read_export, reconcile
from keystrata_client.keys import KeyClient

EXTRA = (
    "\n[relay]\nsegment_bytes = 4096\nmin_segment_bytes = 512\ncycle_seconds = 0.1\n"
    "\n[ledger]\ncheckpoint_seconds = 0.2\n"
)
HELD = "[server]\nbackground_work = false\n"


@pytest.fixture(autouse=True)
def state(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """The auditor's state folder, for the commands started here (they inherit it)."""
    monkeypatch.setenv("KEYSTRATA_AUDIT_STATE", str(tmp_path / "auditor-state"))
    monkeypatch.setenv("XDG_STATE_HOME", str(tmp_path / "xdg-state"))
    return tmp_path / "auditor-state"


@pytest.fixture
def network(tmp_path: Path, pki: PkiFiles) -> Iterator[dict[str, NodeProcess]]:
    nodes = start_network(
        tmp_path, pki, {n: f"sqlite:///{tmp_path}/{n}.db" for n in NETWORK}, extra=EXTRA,
        saes=True,
    )  # fmt: skip
    try:
        add_auditor(nodes, pki)
        feed_links(nodes, pki, 40)
        stock_and_stop(nodes, pki, 16, until=quiet)
        yield nodes
    finally:
        stop_all(list(nodes.values()))


def _rekey(nodes: dict[str, NodeProcess], pki: PkiFiles, master: str, slave: str) -> list[str]:
    """The master takes two keys at its station, the slave fetches them at its own."""
    here, there = ("station-a", "station-b") if master.startswith("sae-a") else (
        "station-b", "station-a")  # fmt: skip
    with KeyClient(nodes[here].url, pki.identity(master)) as kme:
        sent = kme.get_keys(slave, number=2, size=256)
    with KeyClient(nodes[there].url, pki.identity(slave)) as kme:
        got = kme.get_keys_with_ids(master, sent.key_ids)
    assert [k.digest() for k in got] == [k.digest() for k in sent]
    return list(sent.key_ids)


def _allocate(node: NodeProcess, pki: PkiFiles) -> list[str]:
    with KeyClient(node.url, pki.identity("sae-a1")) as kme:
        return list(kme.get_keys("sae-b1", number=3, size=256).key_ids)


def _checkpointed(node: NodeProcess, pki: PkiFiles) -> None:
    """Until the latest checkpoint covers every entry (its size stops moving)."""
    with AuditClient(node.url, pki.identity("aud-ben")) as client:
        seen, since, deadline = -1, time.monotonic(), time.monotonic() + 30
        while time.monotonic() < deadline:
            try:
                size = int(client.latest_checkpoint()["tree_size"])
            except ApiError:
                size = -1
            if size != seen:
                seen, since = size, time.monotonic()
            elif size > 0 and time.monotonic() - since > 1.0:
                return
            time.sleep(0.1)
    raise AssertionError(f"no stable checkpoint at {node.node_id}")


def _export(node: NodeProcess, pki: PkiFiles, out: Path) -> Path:
    _checkpointed(node, pki)
    said = run_cli(
        "audit", "export", "--url", node.url, "--ca", str(pki.ca),
        "--cert", str(pki.cert("aud-ben")), "--key", str(pki.key("aud-ben")), "--out", str(out),
    ).stdout  # fmt: skip
    # The root as the ledger API gives it (Base64 root_hash), not another encoding.
    root = json.loads((out / "checkpoint.json").read_text())["root_hash"]
    assert f"root {root};" in said, said
    return out


def _restart(node: NodeProcess, pki: PkiFiles, *, held: bool) -> None:
    """Restart a node with its background work (outbox, checkpoints) off or on."""
    node.stop()
    config = node.config.read_text()
    node.config.write_text(
        config.replace("[server]\n", HELD, 1) if held else config.replace(HELD, "[server]\n", 1)
    )
    node.start(pki)


def _reconciled(a: Path, b: Path, *args: str) -> tuple[int, dict[str, Any]]:
    result = run_cli("audit", "reconcile", str(a), str(b), "--format", "json", *args, check=False)
    return result.returncode, json.loads(result.stdout)


def test_healthy_exports_reconcile_with_keys_in_flight_and_later(network, pki, tmp_path) -> None:
    a, b = network["station-a"], network["station-b"]
    delivered = _rekey(network, pki, "sae-a1", "sae-b1") + _rekey(network, pki, "sae-b2", "sae-a2")
    # Keys allocated at A while its outbox is held: B has not heard of them when B's
    # export is taken (B signs a checkpoint after them: an operator change is new there).
    _restart(a, pki, held=True)
    on_their_way = _allocate(a, pki)
    with OperatorClient(b.url, pki.identity("ops-ada")) as ops:
        ops.create("nodes", {"node_id": "station-z", "role": "station"})
    export_b = _export(b, pki, tmp_path / "b")
    # A's outbox runs again (B receives them now, after its export); two more keys after.
    _restart(a, pki, held=False)
    after = _rekey(network, pki, "sae-a1", "sae-b1")
    export_a = _export(a, pki, tmp_path / "a")

    code, found = _reconciled(export_a, export_b)
    assert code == 0, found
    status = {k["key_id"]: k["status"] for k in found["keys"]}
    assert {status[k] for k in delivered} == {"delivered"}
    assert {status[k] for k in on_their_way} == {"in_flight"}
    assert {status[k] for k in after} == {"after_cutoff"}
    assert found["ok"] is True and set(found["pairs"]) == {PAIR}
    assert found["as_of"] == read_export(export_b).time < read_export(export_a).time
    table = run_cli("audit", "reconcile", str(export_b), str(export_a))
    assert "in flight" in table.stdout and "later" in table.stdout
    assert "reading the exports" not in table.stdout + table.stderr  # piped: no bar
    # From a terminal, reconciliation shows its progress bar (export: at the end).
    shown = on_a_terminal(["audit", "reconcile", str(export_b), str(export_a)])
    assert "reading the exports" in shown and "in flight" in shown
    assert "no key served twice, one-sided, mismatched or unsettled" in table.stdout
    # With the cut-off at A's export, the keys after B's export are compared: B's
    # export has no trace of them, nor of anything after them, so they are in flight.
    code, late = _reconciled(export_a, export_b, "--as-of", read_export(export_a).time)
    assert code == 0 and late["as_of"] == read_export(export_a).time
    assert {k["status"] for k in late["keys"] if k["key_id"] in after} == {"in_flight"}

    # Later exports of both: everything settled, nothing flagged.
    final_b = _export(b, pki, tmp_path / "b2")
    final_a = _export(a, pki, tmp_path / "a2")
    code, found = _reconciled(final_a, final_b)
    assert code == 0 and found["ok"], found
    # A key received at B removed from B's entries (as if its row were lost): A handed
    # it to its master and B recorded later keys, so it is one sided.
    lost = delivered[0]
    entries_b = [
        {**e, "key_ids": [k for k in e["key_ids"] if k != lost]} if "key_ids" in e else e
        for e in read_export(final_b).entries
    ]
    assert entries_b != read_export(final_b).entries
    result = reconcile(read_export(final_a).entries, entries_b)
    assert [(k.key_id, k.status) for k in result.flagged] == [(lost, "one_sided")]
    assert not result.ok

    # An export from a terminal shows its progress bar (after the others: the auditor's
    # state remembers the newest checkpoint seen, and older exports would be refused).
    identity = {"KEYSTRATA_CA": str(pki.ca), "KEYSTRATA_CERT": str(pki.cert("aud-ben")),
                "KEYSTRATA_KEY": str(pki.key("aud-ben")), "KEYSTRATA_URL": b.url}  # fmt: skip
    shown = on_a_terminal(["audit", "export", "--out", str(tmp_path / "b-tty")], env=identity)
    assert f"exporting {b.url}" in shown and "verified offline: yes" in shown
