"""Auditor API: signed checkpoints (Ed25519, RFC 8032, verified here with the
`cryptography` library directly), RFC 9162 proofs that verify against them, and entries
whose bytes are their RFC 8785 canonical form (cross-checked with the `rfc8785`
package)."""

from __future__ import annotations

import base64
from datetime import datetime

import rfc8785
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

from helpers import ledger_entries, mth
from keystrata.ledger import checkpoints, merkle
from keystrata_client.audit.export import Checkpoint


def test_checkpoint_is_signed_and_proofs_verify(station, api) -> None:
    ctx = station.ctx
    first = checkpoints.sign_now(ctx, force=True)
    assert first is not None
    aud = api(station)("aud-ben")
    cp = aud.get("/api/v1/audit/checkpoints/latest").json()
    entries = ledger_entries(ctx.db)
    assert cp["tree_size"] == len(entries)
    root = base64.b64decode(cp["root_hash"])
    assert root == mth(entries)
    # The signed text is the body of a C2SP tlog checkpoint (origin, size, Base64 root;
    # from memory) and our extension line with the signing time, RFC 3339 in UTC (the
    # standard library's parser as reference).
    lines = cp["signed_text"].split("\n")
    assert lines[:3] == ["station-a", str(len(entries)), cp["root_hash"]]
    assert len(lines) == 5 and lines[4] == ""  # four lines, each ending in a newline
    marker, _, at = lines[3].rpartition(" ")
    assert marker == "keystrata/v2 signed-at" and at.endswith("Z")
    assert datetime.fromisoformat(at) == first.signed_at == datetime.fromisoformat(cp["signed_at"])
    key = Ed25519PublicKey.from_public_bytes(base64.b64decode(cp["public_key"]))
    key.verify(base64.b64decode(cp["signature"]), cp["signed_text"].encode())  # RFC 8032
    # Nothing new: no second checkpoint.
    assert checkpoints.sign_now(ctx, force=True) is None
    # Inclusion proofs against the checkpoint.
    for index in (0, len(entries) // 2, len(entries) - 1):
        proof = aud.get(
            f"/api/v1/audit/proofs/inclusion?index={index}&tree_size={cp['tree_size']}"
        ).json()
        merkle.verify_inclusion(
            merkle.leaf_hash(entries[index]),
            index,
            cp["tree_size"],
            [base64.b64decode(p) for p in proof["audit_path"]],
            root,
        )
    # More entries, a new checkpoint, and a consistency proof between the two.
    ops = api(station)("ops-ada")
    assert (
        ops.patch("/api/v1/registry/nodes/station-b", json={"description": "moved"}).status_code
        == 200
    )
    second = checkpoints.sign_now(ctx, force=True)
    assert second is not None and second.tree_size > first.tree_size
    proof = aud.get(
        f"/api/v1/audit/proofs/consistency?first={first.tree_size}&second={second.tree_size}"
    ).json()
    merkle.verify_consistency(
        first.tree_size,
        second.tree_size,
        first.root_hash,
        second.root_hash,
        [base64.b64decode(p) for p in proof["proof"]],
    )
    listed = aud.get("/api/v1/audit/checkpoints").json()["checkpoints"]
    assert [c["tree_size"] for c in listed] == [second.tree_size, first.tree_size]
    # The auditor's verifier reads the times the node signs (the client's own parser).
    read = [Checkpoint.read(c, "api") for c in listed]
    assert [c.signed_at for c in read] == [second.signed_at, first.signed_at]
    assert read[0].signed_at is not None and read[1].signed_at is not None
    assert read[0].signed_at >= read[1].signed_at


def test_entries_are_canonical_json(station, api) -> None:
    answer = api(station)("aud-ben").get("/api/v1/audit/entries?start=0&end=5").json()
    assert [e["index"] for e in answer["entries"]] == [0, 1, 2, 3, 4]
    for e in answer["entries"]:
        raw = base64.b64decode(e["entry_b64"], validate=True)  # RFC 4648
        assert rfc8785.dumps(e["entry"]) == raw  # RFC 8785, independent implementation
        assert e["entry"]["index"] == e["index"]


def test_bad_proof_requests_are_400(station, api) -> None:
    aud = api(station)("aud-ben")
    for path in (
        "/api/v1/audit/proofs/inclusion?index=100000",
        "/api/v1/audit/proofs/inclusion?index=0&tree_size=100000",
        "/api/v1/audit/proofs/consistency?first=0",
        "/api/v1/audit/proofs/inclusion?index=-1",
        "/api/v1/audit/proofs/inclusion?index=true",
    ):
        r = aud.get(path)
        assert r.status_code == 400, (path, r.text)
        assert "message" in r.json()
    assert aud.get("/api/v1/audit/checkpoints/latest").status_code == 404  # none yet
    assert api(station)("ops-ada").get("/api/v1/audit/entries").status_code == 403
