"""``OperatorClient`` against a real `keystrata serve` process over mutual TLS: how the
client and a node understand each other (registry round trip, errors, roles)."""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest

from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, prepare_node
from keystrata_client import (
    ApiError,
    OperatorClient,
    TlsIdentity,
)


def identity(pki: PkiFiles, name: str) -> TlsIdentity:
    return TlsIdentity(ca=pki.ca, cert=pki.cert(name), key=pki.key(name))


@pytest.fixture
def station_process(tmp_path: Path, pki: PkiFiles, sqlite_template: Path) -> Iterator[NodeProcess]:
    db = tmp_path / "station.db"
    shutil.copy(sqlite_template, db)
    node = prepare_node(tmp_path, pki, "station-a", "station", f"sqlite:///{db}").start(pki)
    try:
        yield node
    finally:
        node.stop()


def test_registry_round_trip_and_errors_from_a_real_node(
    station_process: NodeProcess, pki: PkiFiles
) -> None:
    url = station_process.url
    with OperatorClient(url, identity(pki, "ops-ada")) as ops:
        assert ops.node_info()["node_id"] == "station-a"
        relay = ops.create("nodes", {"node_id": "relay-1", "role": "relay"})
        assert (relay["node_id"], relay["role"], relay["retired_at"]) == ("relay-1", "relay", None)
        ops.create("links", {"link_id": "link-a", "relay_id": "relay-1", "station_id": "station-a"})
        ops.create(
            "principals",
            {"principal_id": "aud-ben", "role": "auditor", "cert_subject": "aud-ben"},
        )
        changed = ops.change("links", "link-a", {"description": "relay-1 to station-a"})
        assert changed["description"] == "relay-1 to station-a"
        assert ops.get("links", "link-a") == changed
        assert [n["node_id"] for n in ops.list("nodes")] == ["relay-1", "station-a"]
        pools = ops.pools()
        assert pools["node_id"] == "station-a"
        assert [(p["link_id"], p["bits_available"]) for p in pools["pools"]] == [("link-a", 0)]
        assert ops.pool("link-a")["peer_node_id"] == "relay-1"

        with pytest.raises(ApiError) as unknown:
            ops.get("nodes", "relay-9")
        assert (unknown.value.status, unknown.value.message) == (404, "nodes: no entry 'relay-9'")
        with pytest.raises(ApiError) as again:
            ops.create("nodes", {"node_id": "relay-1", "role": "relay"})
        assert again.value.status == 409
        with pytest.raises(ApiError) as invalid:
            ops.create("nodes", {"node_id": "relay-2", "role": "relay", "colour": "red"})
        assert invalid.value.status == 400
        assert any(d.get("field") == "body.colour" for d in invalid.value.details)
        with pytest.raises(ApiError) as busy:
            ops.retire("nodes", "relay-1")  # link-a still uses it
        assert busy.value.status == 409 and "link link-a" in busy.value.message

    with OperatorClient(url, identity(pki, "aud-ben")) as auditor:
        assert [x["link_id"] for x in auditor.list("links")] == ["link-a"]
        with pytest.raises(ApiError) as refused:
            auditor.create("nodes", {"node_id": "relay-2", "role": "relay"})
        assert refused.value.status == 403

    with OperatorClient(url, identity(pki, "stranger")) as stranger:
        with pytest.raises(ApiError) as unauthenticated:
            stranger.pools()
        assert unauthenticated.value.status == 401
