"""Ledger audit: export a node's ledger, and verify an export offline.

An auditor (a principal with role ``auditor``) exports the ledger over mutual TLS, keeps
the folder, and checks it anywhere later without the node::

    from pathlib import Path
    from keystrata_client import TlsIdentity
    from keystrata_client.audit import AuditClient, verify_export, write_export

    me = TlsIdentity(ca=Path("ca.pem"), cert=Path("audit.pem"), key=Path("audit.key"))
    with AuditClient("https://relay-vela.example:8443", me) as node:
        write_export(node, "ledger-2026-12-02")
    report = verify_with_state("ledger-2026-12-02", Path("~/audit-state").expanduser())
    if not report.ok:
        print(report.first_bad, report.findings)

``verify_with_state`` keeps, per node, the ledger key pinned on first use and the last
checkpoint seen, and refuses an export signed with another key, a truncated log or a
fork (:mod:`keystrata_client.audit.state`). The same check from a shell:
``keystrata-ledger-check ledger-2026-12-02`` (state in ``--state DIR``,
``$KEYSTRATA_AUDIT_STATE`` or the per-user state folder). The verifier carries its own
RFC 9162 Merkle code and checks the node's Ed25519 signatures with ``cryptography``; it
imports nothing from the server package.

Public API:

``AuditClient(base_url, identity=None, *, client=None, timeout=30.0)``
    ``latest_checkpoint()``, ``checkpoints(limit, before)``, ``entries(start, end)``
    (an iterator that pages), ``inclusion_proof(index, tree_size)``,
    ``consistency_proof(first, second)``.
``write_export(client, out_dir, *, overwrite=False) -> ExportSummary``
    Writes ``entries.jsonl``, ``checkpoints.jsonl`` and ``checkpoint.json``.
``verify_export(directory, *, public_key=None, earlier=(), check_index=None,
last_seen=None, now=None) -> Report``
    ``Report.ok``, ``origin``, ``tree_size``, ``root``, ``public_key``, ``signed_at``,
    ``pinning``, ``entries``, ``events``, ``first_bad``, ``findings``, ``notes``.
``verify_with_state(directory, state_dir, *, public_key=None, trust_new_key=False,
earlier=(), check_index=None, now=None) -> Report``
    The same, against the state kept for the export's node, updated when it verifies.
"""

from keystrata_client.audit.export import AuditClient, ExportSummary, write_export
from keystrata_client.audit.state import StateError, verify_with_state
from keystrata_client.audit.verify import Report, verify_export

__all__ = [
    "AuditClient",
    "ExportSummary",
    "Report",
    "StateError",
    "verify_export",
    "verify_with_state",
    "write_export",
]
