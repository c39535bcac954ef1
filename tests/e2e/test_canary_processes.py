"""Key material in a real node's output: `keystrata serve` with uvicorn's access log at
INFO names each request by its route template and status, and its output holds no
trace of a link key a client put into refused and accepted requests."""

from __future__ import annotations

import json
from typing import Any

import httpx

from canaries import LINK_KEY, Scanner, probe
from keystrata.loopback.pki import PkiFiles


def test_the_access_log_of_a_real_node_shows_route_templates(
    tmp_path: Any, pki: PkiFiles, sqlite_template: Any
) -> None:
    """`keystrata serve` with uvicorn's access log at INFO: refused and accepted requests
    whose path and query hold a link key. The process's output names each request by
    its route template and status, and holds no trace of the key (attack test: uvicorn
    printed every raw path and query)."""
    import shutil
    import ssl

    from keystrata.loopback.processes import prepare_node

    shutil.copy(sqlite_template, tmp_path / "station-a.db")
    url = f"sqlite:///{tmp_path / 'station-a.db'}"  # the access log is the same on both
    node = prepare_node(tmp_path / "station-a", pki, "station-a", "station", url)
    node.start(pki)
    scanner = Scanner()
    scanner.add(LINK_KEY)
    answers = []
    try:
        for cert, template in [
            ("stranger", "/api/v1/keys/{}/status"),  # refused: unknown subject
            ("ops-ada", "/api/v1/registry/nodes/{}"),  # accepted, 404
            ("ops-ada", "/api/v1/node/../node?{}"),  # accepted, 200 (query only)
        ]:
            tls = ssl.create_default_context(cafile=str(pki.ca))
            tls.load_cert_chain(str(pki.cert(cert)), str(pki.key(cert)))
            path, headers = probe(LINK_KEY, template)
            with httpx.Client(base_url=node.url, verify=tls, timeout=10) as client:
                answers.append(client.get(path, headers=headers).status_code)
                if cert == "stranger":  # five more: counted, not written one by one
                    answers += [client.get(path).status_code for _ in range(5)]
    finally:
        node.stop()  # SIGTERM: the app's shutdown writes the counted refusals
    assert answers[:7] == [401] * 6 + [404], answers
    import sqlite3

    with sqlite3.connect(tmp_path / "station-a.db") as db:
        rows = db.execute("SELECT entry FROM ledger_entry WHERE event = 'auth.refused'")
        refused = [json.loads(bytes(r[0])) for r in rows]
    status_route = [e for e in refused if e["route"] == "/api/v1/keys/{slave_SAE_ID}/status"]
    assert len(status_route) == 2 and sum(e["count"] for e in status_route) == 6, refused
    output = node.log.read_text()
    assert '"GET /api/v1/keys/{slave_SAE_ID}/status HTTP/1.1" 401' in output, output
    assert '"GET /api/v1/registry/nodes/{entry_id} HTTP/1.1" 404' in output, output
    found = scanner.find(output)
    assert not found, f"key material in the node's output ({found}):\n{output}"
