"""After a demo run, audit it the way an auditor would: wait until every node has signed
a checkpoint covering its whole ledger, export each ledger with the auditor's
certificate, verify each export offline, and reconcile the two stations of every pair."""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path

from keystrata.demo import scenario
from keystrata.demo.layout import Column, Fitted, Sheet
from keystrata.demo.workdir import CHECKPOINT_SECONDS, DemoNode
from keystrata_client import TlsIdentity
from keystrata_client.audit import AuditClient, Report, verify_export, write_export
from keystrata_client.audit.reconcile import HEADERS, Reconciliation, read_entries, reconcile


def auditor_identity(workdir: Path) -> TlsIdentity:
    pki = workdir / "pki"
    return TlsIdentity(
        ca=pki / "ca.crt",
        cert=pki / f"{scenario.AUDITOR}.crt",
        key=pki / f"{scenario.AUDITOR}.key",
    )


@dataclass
class AuditResult:
    reports: dict[str, Report] = field(default_factory=dict)
    pairs: dict[str, Reconciliation] = field(default_factory=dict)
    problems: list[str] = field(default_factory=list)


def wait_for_checkpoints(nodes: list[DemoNode], identity: TlsIdentity, timeout: float) -> None:
    """Return once no node's latest checkpoint has moved for a few checkpoint periods
    (so each covers everything the node recorded), or when ``timeout`` runs out."""
    quiet = 3 * CHECKPOINT_SECONDS + 1
    clients = [AuditClient(n.url, identity, timeout=10) for n in nodes]
    try:
        seen: list[int] = []
        since = time.monotonic()
        deadline = since + timeout
        while time.monotonic() < deadline:
            sizes = [int(c.latest_checkpoint()["tree_size"]) for c in clients]
            if sizes != seen:
                seen, since = sizes, time.monotonic()
            elif time.monotonic() - since >= quiet:
                return
            time.sleep(0.5)
    finally:
        for c in clients:
            c.close()


def audit(workdir: Path, nodes: list[DemoNode]) -> AuditResult:
    """Export, verify and reconcile; exports go to ``workdir/audit/<node>``."""
    identity = auditor_identity(workdir)
    result = AuditResult()
    wait_for_checkpoints(nodes, identity, timeout=60)
    folders = {}
    for node in nodes:
        folder = workdir / "audit" / node.node_id
        with AuditClient(node.url, identity, timeout=30) as client:
            write_export(client, folder, overwrite=True)
        report = verify_export(folder)
        result.reports[node.node_id] = report
        folders[node.node_id] = folder
        if not report.ok:
            result.problems.append(
                f"ledger of {node.node_id} does not verify: first bad entry "
                f"{report.first_bad}: {'; '.join(report.findings[:3])}"
            )
    for a, b in scenario.PAIRS:
        pair = scenario.pair_id(a, b)
        found = reconcile(read_entries(folders[a]), read_entries(folders[b]), pair=pair)
        result.pairs[pair] = found
        result.problems += [f"{pair}: key {k.key_id} {k.status}: {k.reason}" for k in found.flagged]
    return result


def ledgers_table(result: AuditResult) -> Fitted:
    sheet = Sheet(
        "ledgers, verified offline against signed checkpoints",
        (
            Column("node", "left"),
            Column("entries"),
            Column("root (SHA-256, Base64, start)", "left", drop=1),
            Column("verified", "left"),
        ),
    )
    for node_id, r in result.reports.items():
        sheet.rows.append(
            (
                node_id,
                f"{r.tree_size or 0:,}",
                r.root[:12] if r.root else "-",
                "[green]yes[/green]" if r.ok else "[red]NO[/red]",
            )
        )
    return Fitted(sheet)


def reconciliation_table(result: AuditResult) -> Fitted:
    # On a narrow terminal the counts that are not findings go first.
    columns = {
        "delivered": 0,
        "expired": 2,
        "waiting": 1,
        "in_flight": 1,
        "after_cutoff": 2,
        "served_twice": 0,
        "one_sided": 0,
        "mismatch": 0,
        "unsettled": 0,
    }
    sheet = Sheet(
        "reconciliation per pair (both stations' ledgers, key ID by key ID)",
        (
            Column("pair", "left"),
            *(
                Column(HEADERS.get(name, name.replace("_", " ")), drop=rank)
                for name, rank in columns.items()
            ),
        ),
    )
    for pair, rec in result.pairs.items():
        counts = rec.counts().get(pair, {})
        sheet.rows.append((pair.removeprefix("pair-"), *(f"{counts.get(c, 0):,}" for c in columns)))
    return Fitted(sheet)
