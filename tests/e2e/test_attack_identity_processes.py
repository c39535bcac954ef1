"""Attack tests of identity on a real `keystrata serve` process: a client certificate on
the node's certificate revocation list is refused at the TLS handshake, also when it
was revoked while the node runs (no restart)."""

from __future__ import annotations

import os
import shutil
import ssl
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from keystrata.crypto.certificates import fingerprint_sha256
from keystrata.loopback.pki import PkiFiles, make_pki
from keystrata.loopback.processes import NodeProcess, prepare_node, run_cli

#: Operators of the revocation tests: ada stays valid, eve is revoked before the node
#: starts, mallory while it runs.
OPERATORS = ("ops-ada", "ops-eve", "ops-mallory")


@pytest.fixture(scope="module")
def own_pki(tmp_path_factory: pytest.TempPathFactory) -> PkiFiles:
    """A PKI of this module only: revoking here never touches the session's PKI."""
    folder = tmp_path_factory.mktemp("revoking-pki") / "ca"
    return make_pki(
        folder, "Revocation Test CA", ["station-a"], dict.fromkeys(OPERATORS, "operator")
    )


def _handshake(url: str, pki: PkiFiles, name: str) -> int | None:
    """Status of GET /api/v1/node as ``name``, or None when TLS refused the client."""
    ctx = ssl.create_default_context(cafile=str(pki.ca))
    ctx.load_cert_chain(str(pki.cert(name)), str(pki.key(name)))
    try:
        return httpx.get(url + "/api/v1/node", verify=ctx, timeout=5).status_code
    except (httpx.ConnectError, httpx.ReadError, httpx.RemoteProtocolError):
        # TLS 1.3: the server's refusal of the client certificate comes after the
        # client's side of the handshake ended, so httpx sees the connection drop.
        return None


@pytest.fixture(scope="module")
def revoking_node(
    own_pki: PkiFiles, tmp_path_factory: pytest.TempPathFactory, sqlite_template: Path
) -> Iterator[NodeProcess]:
    """station-a with ``[tls] crl``, ops-eve revoked before it starts, the other two
    operators registered (pinned) and valid."""
    folder = tmp_path_factory.mktemp("revoking-node")
    db = folder / "station-a.db"
    shutil.copy(sqlite_template, db)
    run_cli("pki", "revoke", "--dir", str(own_pki.dir), "--cert", str(own_pki.cert("ops-eve")))
    node = prepare_node(folder, own_pki, "station-a", "station", f"sqlite:///{db}")
    text = node.config.read_text()
    key_line = f'key = "{own_pki.key("station-a")}"\n'
    # A relative path, taken from the config file's folder like the other tls paths.
    crl = os.path.relpath(own_pki.dir / "crl.pem", node.config.parent)
    node.config.write_text(text.replace(key_line, key_line + f'crl = "{crl}"\n', 1))
    node.start(own_pki)
    try:
        from keystrata_client import OperatorClient, TlsIdentity

        ops = TlsIdentity(ca=own_pki.ca, cert=own_pki.cert("ops-ada"), key=own_pki.key("ops-ada"))
        with OperatorClient(node.url, ops) as client:
            for name in ("ops-eve", "ops-mallory"):
                client.create(
                    "principals",
                    {
                        "principal_id": name,
                        "role": "operator",
                        "cert_subject": name,
                        "cert_sha256": fingerprint_sha256(own_pki.cert(name).read_bytes()),
                    },
                )
        yield node
    finally:
        node.stop()


def test_revoked_operator_certificate_is_refused_at_the_handshake(
    revoking_node: NodeProcess, own_pki: PkiFiles
) -> None:
    # Attacker: holds ops-eve's key and certificate, revoked before the node started;
    # the principal is still registered (nobody retired it), so only the CRL stops it.
    assert _handshake(revoking_node.url, own_pki, "ops-ada") == 200  # control
    assert _handshake(revoking_node.url, own_pki, "ops-eve") is None


def test_certificate_revoked_while_the_node_runs_is_refused_without_restart(
    revoking_node: NodeProcess, own_pki: PkiFiles
) -> None:
    assert _handshake(revoking_node.url, own_pki, "ops-mallory") == 200
    pid = revoking_node.proc.pid if revoking_node.proc else None
    run_cli("pki", "revoke", "--dir", str(own_pki.dir), "--cert", str(own_pki.cert("ops-mallory")))
    # The next handshake already sees the new CRL: the node checks the file's identity
    # (inode, size, modification time) at each handshake. A short wait covers file
    # systems with coarse modification times.
    deadline = time.monotonic() + 5
    while _handshake(revoking_node.url, own_pki, "ops-mallory") is not None:
        assert time.monotonic() < deadline, "the node still accepts a revoked certificate"
        time.sleep(0.2)
    assert revoking_node.proc is not None and revoking_node.proc.pid == pid  # no restart
    assert _handshake(revoking_node.url, own_pki, "ops-ada") == 200
