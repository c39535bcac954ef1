"""Registry API: operators create, list, change and retire; bad input is a 4xx with a
message and leaves the database as it was."""

from __future__ import annotations

import json
from typing import Any

import pytest

from helpers import ledger_events, snapshot

PAIR = {"pair_id": "pair-ab", "relay_id": "relay-1", "stations": ["station-b", "station-a"]}


def test_create_list_change_retire_a_pair(station, api) -> None:
    ops = api(station)("ops-ada")
    r = ops.post("/api/v1/registry/pairs", json=PAIR | {"policy": {"priority": 7}})
    assert r.status_code == 201, r.text
    pair = r.json()
    assert pair["stations"] == ["station-a", "station-b"]  # stored in a canonical order
    assert pair["policy"]["priority"] == 7
    assert pair["policy"]["default_key_size"] == 256

    r = ops.patch(
        "/api/v1/registry/pairs/pair-ab",
        json={"policy": {"daily_quota_bits": 1_000_000, "priority": 9}},
    )
    assert r.status_code == 200, r.text
    assert r.json()["policy"]["daily_quota_bits"] == 1_000_000
    assert r.json()["policy"]["priority"] == 9

    listed = ops.get("/api/v1/registry/pairs").json()["items"]
    assert [p["pair_id"] for p in listed] == ["pair-ab", "pair-ac"]  # pair-ac: seeded

    r = ops.delete("/api/v1/registry/pairs/pair-ab")
    assert r.status_code == 200 and r.json()["retired_at"] is not None
    assert [p["pair_id"] for p in ops.get("/api/v1/registry/pairs").json()["items"]] == ["pair-ac"]
    assert len(ops.get("/api/v1/registry/pairs?include_retired=true").json()["items"]) == 2
    # IDs are never reused.
    assert ops.post("/api/v1/registry/pairs", json=PAIR).status_code == 409
    events = ledger_events(station.ctx)
    assert events[-3:] == ["registry.created", "registry.changed", "registry.retired"]


def test_auditor_reads_but_cannot_write(station, api) -> None:
    aud = api(station)("aud-ben")
    assert aud.get("/api/v1/registry/links").status_code == 200
    before = snapshot(station.ctx)
    r = aud.post("/api/v1/registry/pairs", json=PAIR)
    assert r.status_code == 403
    assert r.json() == {"message": "this route is not open to your role"}
    after = snapshot(station.ctx)
    # Only the refusal was recorded.
    assert {k: v for k, v in after.items() if not k.startswith("ledger")} == {
        k: v for k, v in before.items() if not k.startswith("ledger")
    }
    assert ledger_events(station.ctx)[-1] == "auth.refused"


def test_retire_refuses_while_used(station, api) -> None:
    ops = api(station)("ops-ada")
    r = ops.delete("/api/v1/registry/links/link-a")
    assert r.status_code == 409
    assert "principal mod-link-a" in r.json()["message"]
    assert ops.delete("/api/v1/registry/nodes/station-a").status_code == 409  # itself


def test_principal_for_sae_needs_its_station(station, api) -> None:
    ops = api(station)("ops-ada")
    r = ops.post(
        "/api/v1/registry/principals",
        json={"principal_id": "sae-x", "role": "sae", "cert_subject": "sae-x"},
    )
    assert r.status_code == 400
    assert "station_id" in r.json()["message"]
    r = ops.post(
        "/api/v1/registry/principals",
        json={
            "principal_id": "sae-x",
            "role": "sae",
            "cert_subject": "sae-x",
            "station_id": "station-b",
        },
    )
    assert r.status_code == 201, r.text
    # One active principal per certificate subject.
    r = ops.post(
        "/api/v1/registry/principals",
        json={
            "principal_id": "sae-y",
            "role": "sae",
            "cert_subject": "sae-x",
            "station_id": "station-b",
        },
    )
    assert r.status_code == 409


BAD: list[tuple[str, str, Any, int, str]] = [
    ("POST", "nodes", {"node_id": "x", "role": "satellite"}, 400, "role"),
    ("POST", "nodes", {"node_id": "has space", "role": "station"}, 400, "node_id"),
    ("POST", "nodes", {"node_id": "n1", "role": "station", "url": "http://x"}, 400, "url"),
    ("POST", "nodes", {"node_id": "n1", "role": "station", "extra": 1}, 400, "extra"),
    ("POST", "nodes", {"node_id": "station-b", "role": "station"}, 409, "exists"),
    (
        "POST",
        "links",
        {"link_id": "l9", "relay_id": "station-b", "station_id": "station-c"},
        400,
        "relay",
    ),
    (
        "POST",
        "links",
        {"link_id": "l9", "relay_id": "relay-1", "station_id": "nowhere"},
        400,
        "unknown node",
    ),
    (
        "POST",
        "links",
        {"link_id": "l9", "relay_id": "relay-1", "station_id": "relay-1"},
        400,
        "different",
    ),
    ("POST", "pairs", PAIR | {"stations": ["station-a", "station-a"]}, 400, "different"),
    ("POST", "pairs", PAIR | {"stations": ["station-a"]}, 400, "stations"),
    ("POST", "pairs", PAIR | {"policy": {"min_key_size": 12}}, 400, "multiple"),
    (
        "POST",
        "pairs",
        PAIR | {"policy": {"min_key_size": 512, "default_key_size": 256}},
        400,
        "min_key_size <= default_key_size",
    ),
    ("POST", "pairs", PAIR | {"policy": {"priority": True}}, 400, "priority"),
    ("POST", "pairs", PAIR | {"policy": {"priority": "5"}}, 400, "priority"),
    ("POST", "pairs", PAIR | {"policy": {"priority": 0}}, 400, "priority"),
    ("POST", "pairs", PAIR | {"policy": {"buffer_target_bits": -1}}, 400, "buffer"),
    ("POST", "pairs", PAIR | {"policy": {"daily_quota_bits": 2**70}}, 400, "daily_quota"),
    ("POST", "pairs", PAIR | {"policy": {"max_epsilon": 2.0}}, 400, "max_epsilon"),
    (
        "POST",
        "principals",
        {"principal_id": "m", "role": "qkd-module", "cert_subject": "m", "link_id": "no-such-link"},
        400,
        "unknown link",
    ),
    (
        "POST",
        "principals",
        {"principal_id": "p", "role": "auditor", "cert_subject": "p", "station_id": "station-a"},
        400,
        "only for role sae",
    ),
    (
        "POST",
        "principals",
        {"principal_id": "p", "role": "operator", "cert_subject": "p", "cert_sha256": "XYZ"},
        400,
        "cert_sha256",
    ),
    ("PATCH", "nodes/nowhere", {"description": "x"}, 404, "no entry"),
    ("PATCH", "nodes/station-b", {"role": "relay"}, 400, "role"),
    ("PATCH", "links/link-a", {"station_id": "station-c"}, 400, "station_id"),
    ("DELETE", "principals/nobody", None, 404, "no entry"),
]


@pytest.mark.parametrize(
    ("method", "path", "body", "status", "words"),
    BAD,
    ids=[f"{m}-{p}-{i}" for i, (m, p, *_) in enumerate(BAD)],
)
def test_bad_input_is_refused_and_changes_nothing(
    station, api, method: str, path: str, body: Any, status: int, words: str
) -> None:
    ops = api(station)("ops-ada")
    before = snapshot(station.ctx)
    r = ops.request(method, f"/api/v1/registry/{path}", json=body)
    assert r.status_code == status, r.text
    answer = r.json()
    assert set(answer) <= {"message", "details"}
    assert words in json.dumps(answer)
    assert snapshot(station.ctx) == before


def test_malformed_json_and_huge_bodies(station, api) -> None:
    ops = api(station)("ops-ada")
    before = snapshot(station.ctx)
    r = ops.post(
        "/api/v1/registry/nodes", content=b"{not json", headers={"content-type": "application/json"}
    )
    assert r.status_code == 400 and "message" in r.json()
    r = ops.post(
        "/api/v1/registry/nodes",
        content=b"[" + b"1," * 700_000 + b"1]",
        headers={"content-type": "application/json"},
    )
    assert r.status_code == 413
    r = ops.post(
        "/api/v1/registry/pairs",
        json={
            "pair_id": "p",
            "relay_id": "relay-1",
            "stations": ["station-a", "station-b"],
            "policy": {"priority": 10**30},
        },
    )
    assert r.status_code == 400
    assert snapshot(station.ctx) == before


def test_policy_change_is_checked_whole(station, api) -> None:
    ops = api(station)("ops-ada")
    assert ops.post("/api/v1/registry/pairs", json=PAIR).status_code == 201
    before = snapshot(station.ctx)
    r = ops.patch("/api/v1/registry/pairs/pair-ab", json={"policy": {"max_key_size": 128}})
    assert r.status_code == 400, r.text
    assert "default_key_size" in r.json()["message"]
    r = ops.patch("/api/v1/registry/pairs/pair-ab", json={"policy": {"colour": "red"}})
    assert r.status_code == 400
    assert snapshot(station.ctx) == before
