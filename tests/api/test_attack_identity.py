"""Attacks on identity, written from the attacker's side.

* a holder of a revoked operator certificate: refused at the TLS handshake, and also
  when the certificate is revoked while the node runs (the node reloads the CRL;
  tests/e2e/test_attack_identity_processes.py);
* a client certificate registered as a peer principal (a stolen SAE certificate plus a
  careless registry entry): it cannot post peer messages, because only node
  certificates carry the node marker;
* a stolen node certificate registered as an operator: refused, a node certificate can
  act only as a peer;
* a node that answers at another node's URL with its own valid certificate: our peer
  client refuses to send it anything;
* an operator who creates a peer or operator principal without a certificate pin:
  refused at creation.

Each scenario failed on the code before these checks existed (see the issue's note).
TLS is real where TLS is the subject: `keystrata serve` processes on loopback and a
real TLS server standing in for a peer (tests/peerstub.py).
"""

from __future__ import annotations

import logging
import shutil
from pathlib import Path
from typing import Any

import httpx
import pytest

from helpers import ledger_events, snapshot
from keystrata.crypto.certificates import fingerprint_sha256
from keystrata.crypto.pki import PkiDir
from keystrata.errors import PeerUnavailable
from keystrata.loopback.configs import write_config
from keystrata.loopback.pki import PkiFiles
from keystrata.peering.messages import MessageResult
from peerstub import PeerStub

# ---------------------------------------------------------------- a PKI of the module's own


# ---------------------------------------------------------------- markers (ASGI, both backends)


def test_client_certificate_registered_as_peer_cannot_post_peer_messages(
    station, api, pki: PkiFiles
) -> None:
    # Attacker: holds SAE sae-b2's client certificate (no node marker) and got an
    # operator to register it as the peer relay-2 (a registry mistake or social
    # engineering). It tries to speak as a node.
    ops = api(station)("ops-ada")
    assert ops.post(
        "/api/v1/registry/nodes", json={"node_id": "relay-2", "role": "relay"}
    ).is_success
    created = ops.post(
        "/api/v1/registry/principals",
        json={
            "principal_id": "peer-relay-2",
            "role": "peer",
            "cert_subject": "sae-b2",
            "node_id": "relay-2",
            "cert_sha256": fingerprint_sha256(pki.cert("sae-b2").read_bytes()),
        },
    )
    assert created.status_code == 201, created.text
    before, events = snapshot(station.ctx), len(ledger_events(station.ctx))
    attacker = api(station)("sae-b2")
    message = {"kind": "segment.discarded", "v": 1, "pair_id": "pair-ac", "segment_id": "s-1"}
    answer = attacker.post("/api/v1/peer/messages/batch", json={"messages": [message]})
    assert answer.status_code == 401, (answer.status_code, answer.text)
    assert answer.json() == {"message": "unauthorized"}
    assert attacker.get("/api/v1/peer/pairs/pair-ac/buffer").status_code == 401
    after = ledger_events(station.ctx)
    assert "auth.refused" in after[events:]  # recorded
    assert _without_ledger(snapshot(station.ctx)) == _without_ledger(before)  # no change


def _without_ledger(tables: dict[str, Any]) -> dict[str, Any]:
    return {name: rows for name, rows in tables.items() if not name.startswith("ledger")}


def test_node_certificate_cannot_act_as_an_operator(station, api, pki: PkiFiles) -> None:
    # Attacker: stole station-b's node key and certificate (a node's disk) and an operator
    # principal was registered for that subject, pinned to that very certificate.
    ops = api(station)("ops-ada")
    created = ops.post(
        "/api/v1/registry/principals",
        json={
            "principal_id": "ops-node",
            "role": "operator",
            "cert_subject": "station-b",
            "cert_sha256": fingerprint_sha256(pki.cert("station-b").read_bytes()),
        },
    )
    assert created.status_code == 201, created.text
    events = len(ledger_events(station.ctx))
    attacker = api(station)("station-b")
    assert attacker.get("/api/v1/registry/nodes").status_code == 401
    answer = attacker.post(
        "/api/v1/registry/principals",
        json={
            "principal_id": "ops-mine",
            "role": "operator",
            "cert_subject": "mine",
            "cert_sha256": "0" * 64,
        },
    )
    assert answer.status_code == 401
    assert ops.get("/api/v1/registry/principals/ops-mine").status_code == 404
    assert "auth.refused" in ledger_events(station.ctx)[events:]


@pytest.mark.parametrize("role", ["peer", "operator"])
def test_peer_or_operator_principal_without_a_pin_is_refused(station, api, role: str) -> None:
    # Attacker's aim: a principal that any certificate with the right CN can use (a CA
    # that issues one more certificate with that name is enough).
    ops = api(station)("ops-ada")
    body = {"principal_id": "unpinned", "role": role, "cert_subject": "unpinned"}
    if role == "peer":
        body["node_id"] = "station-b"
    before = snapshot(station.ctx)
    answer = ops.post("/api/v1/registry/principals", json=body)
    assert answer.status_code == 400, answer.text
    assert "cert_sha256" in answer.json()["message"]
    assert snapshot(station.ctx) == before  # nothing written, not even a ledger entry
    # Nor can an existing pinned one lose its pin.
    answer = ops.patch("/api/v1/registry/principals/ops-ada", json={"cert_sha256": None})
    assert answer.status_code == 400, answer.text
    assert "cert_sha256" in answer.json()["message"]
    assert snapshot(station.ctx) == before


# ---------------------------------------------------------------- the peer client


def _relay_settings(folder: Path, pki: PkiFiles, peers: dict[str, str]):
    from keystrata.config import load_settings

    extra = "".join(f'\n[[peers]]\nid = "{p}"\nurl = "{u}"\n' for p, u in peers.items())
    path = write_config(
        folder, node_id="relay-1", role="relay", db_url="sqlite:///unused.db", pki=pki, extra=extra
    )
    return load_settings(path, env={})


def test_peer_client_pointed_at_another_nodes_url_refuses_to_send(
    tmp_path: Path, pki: PkiFiles, caplog: pytest.LogCaptureFixture
) -> None:
    from keystrata.peering.client import PeerClient

    # Attacker: station-b (a valid node of the network) answers at the URL the relay has
    # for station-a (a DNS or routing change, or a wrong [[peers]] entry); it would read
    # what the relay sends station-a.
    impostor = PeerStub(pki, "station-b")
    honest = PeerStub(pki, "station-b")
    try:
        settings = _relay_settings(
            tmp_path, pki, {"station-a": impostor.url, "station-b": honest.url}
        )
        client = PeerClient(settings)
        try:
            message = {"kind": "test.seq", "seq": 0}
            with caplog.at_level(logging.WARNING), pytest.raises(PeerUnavailable):
                client.post_messages("station-a", [message])
            assert client.pending_allocations("station-a") is None
            assert client.pair_buffer("station-a", "pair-ab") is None
            assert impostor.record.requests == 0  # nothing reached the wrong node
            assert any("station-a" in r.getMessage() for r in caplog.records)
            # Control: the same client reaches station-b at station-b's URL.
            assert client.post_messages("station-b", [message]) == [
                MessageResult(status=200, segment_id=None, outcome="applied")
            ]
            assert honest.record.requests == 1
        finally:
            client.close()
    finally:
        impostor.close()
        honest.close()


def test_revoked_certificate_is_refused_by_the_identity_check_too(
    station, pki: PkiFiles, tmp_path: Path
) -> None:
    # Attacker: reaches the app past our TLS layer (proxy mode, or a TLS session that
    # began before the revocation) with aud-ben's revoked certificate.
    import dataclasses

    from anyio.from_thread import start_blocking_portal

    from keystrata.crypto.revocation import revoke
    from keystrata.server import compose

    copy = PkiDir(tmp_path / "pki")  # the session's CA, in a folder of this test
    shutil.copytree(pki.dir, copy.path)
    revoke(copy, cert=pki.cert("aud-ben").read_bytes())
    settings = station.ctx.settings
    with_crl = settings.model_copy(
        update={"tls": settings.tls.model_copy(update={"crl": copy.path / "crl.pem"})}
    )
    app = compose(dataclasses.replace(station.ctx, settings=with_crl))

    async def call(name: str) -> int:
        from conftest import _WithClientCert

        transport = httpx.ASGITransport(app=_WithClientCert(app, pki.pem(name)))
        async with httpx.AsyncClient(transport=transport, base_url="https://t") as client:
            return (await client.get("/api/v1/node")).status_code

    events = len(ledger_events(station.ctx))
    with start_blocking_portal() as portal:
        assert portal.call(call, "ops-ada") == 200
        assert portal.call(call, "aud-ben") == 401
    assert "auth.refused" in ledger_events(station.ctx)[events:]


def test_an_operator_registered_before_pins_were_required_is_refused_until_pinned(
    station, api, pki: PkiFiles
) -> None:
    """A database from before pins: its operator row has none. That certificate is
    refused (a stolen one would otherwise act as the operator); the local command pins
    it, recorded in the ledger, and the operator is back."""
    from click.testing import CliRunner
    from sqlalchemy import update

    from keystrata.cli.main import cli
    from keystrata.storage.models import Principal

    with station.ctx.db.write() as s:
        s.execute(
            update(Principal).where(Principal.principal_id == "ops-ada").values(cert_sha256=None)
        )
    assert api(station)("ops-ada").get("/api/v1/registry/nodes").status_code == 401
    result = CliRunner().invoke(
        cli,
        [
            "node",
            "pin",
            "--config",
            str(station.config_path),
            "--principal",
            "ops-ada",
            "--cert",
            str(pki.cert("ops-ada")),
        ],
    )
    assert result.exit_code == 0, result.output
    assert api(station)("ops-ada").get("/api/v1/registry/nodes").status_code == 200
    assert ledger_events(station.ctx)[-1] == "registry.changed"
