"""The ledger export and its offline verification against a real `keystrata serve`
process over mutual TLS: the export verifies, and the node's own RFC 9162 proofs verify
with the client's code."""

from __future__ import annotations

import base64
import json
import shutil
import time
from pathlib import Path

from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, prepare_node
from keystrata_client import OperatorClient, TlsIdentity
from keystrata_client.audit import AuditClient, verify_export, write_export
from keystrata_client.audit._tree import (
    leaf_hash,
    mth,
    verify_consistency,
    verify_inclusion,
)


def test_export_from_a_real_node_verifies(
    tmp_path: Path, pki: PkiFiles, sqlite_template: Path
) -> None:
    db = tmp_path / "relay.db"
    shutil.copy(sqlite_template, db)
    extra = "\n[ledger]\ncheckpoint_seconds = 0.2\ncheckpoint_entries = 1\n"
    node: NodeProcess = prepare_node(
        tmp_path, pki, "relay-1", "relay", f"sqlite:///{db}", extra=extra
    ).start(pki)
    try:
        me = TlsIdentity(ca=pki.ca, cert=pki.cert("ops-ada"), key=pki.key("ops-ada"))
        with OperatorClient(node.url, me) as ops:
            ops.create("principals", {"principal_id": "aud-ben", "role": "auditor",
                                      "cert_subject": "aud-ben"})  # fmt: skip
            for name in ("karsvik", "tollmere", "brenhaven"):
                ops.create("nodes", {"node_id": name, "role": "station"})
        auditor = TlsIdentity(ca=pki.ca, cert=pki.cert("aud-ben"), key=pki.key("aud-ben"))
        with AuditClient(node.url, auditor) as audit:
            deadline = time.monotonic() + 15
            while audit.checkpoints(limit=1)[0]["tree_size"] < 5:  # init, principal, 3 nodes
                assert time.monotonic() < deadline, "no checkpoint of the new entries"
                time.sleep(0.1)
            summary = write_export(audit, tmp_path / "export")
            report = verify_export(tmp_path / "export", check_index=summary.tree_size - 1)
            assert report.ok, report.findings
            assert report.origin == "relay-1" and report.events["registry.created"] >= 4
            # The node's own proofs verify with the client's RFC 9162 code.
            size = summary.tree_size
            root = base64.b64decode(report.root or "")
            lines = (tmp_path / "export" / "entries.jsonl").read_text().splitlines()
            raw = [base64.b64decode(json.loads(line)["entry_b64"]) for line in lines]
            path = audit.inclusion_proof(2, size)["audit_path"]
            verify_inclusion(leaf_hash(raw[2]), 2, size, [base64.b64decode(p) for p in path], root)
            proof = audit.consistency_proof(2, size)["proof"]
            verify_consistency(2, size, mth(raw[:2]), root, [base64.b64decode(p) for p in proof])
    finally:
        node.stop()
