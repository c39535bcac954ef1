"""Link key ingest over the API: JSON and binary forms, duplicates, conflicts, pools."""

from __future__ import annotations

import base64
import os
import struct
import uuid
from datetime import UTC, datetime, timedelta

import pytest

from helpers import ledger_events, snapshot
from keystrata_client import LinkBlock
from keystrata_client._blocks import encode_binary

URL = "/api/v1/links/link-a/blocks"


def _json_block(key: bytes, block_id: str | None = None, **over: object) -> dict[str, object]:
    body: dict[str, object] = {
        "block_id": block_id or str(uuid.uuid4()),
        "key": base64.b64encode(key).decode(),  # RFC 4648 section 4 alphabet, padded
        "qber": 0.021,
        "epsilon": 1e-10,
        "produced_at": datetime.now(UTC).isoformat().replace("+00:00", "Z"),
    }
    return body | over


def test_json_blocks_are_stored_and_counted(station, api) -> None:
    mod = api(station)("mod-link-a")
    blocks = [_json_block(os.urandom(1024)) for _ in range(3)]
    r = mod.post(URL, json={"blocks": blocks})
    assert r.status_code == 200, r.text
    assert r.json() == {
        "link_id": "link-a",
        "accepted": 3,
        "duplicates": 0,
        "accepted_bits": 3 * 8192,
    }
    pool = api(station)("ops-ada").get("/api/v1/links/link-a/pool").json()
    assert pool["bits_available"] == 3 * 8192
    assert pool["bits_used"] == 0
    assert pool["blocks_available"] == 3
    assert pool["peer_node_id"] == "relay-1"
    assert pool["rate_bps"] == 3 * 8192 / pool["window_seconds"]
    assert pool["qber"] == pytest.approx(0.021)
    assert ledger_events(station.ctx)[-1] == "link_key.ingested"
    # The mean weighs blocks by their length: three of 1 KiB at 0.021, one of 3 KiB at 0.041.
    r = mod.post(URL, json={"blocks": [_json_block(os.urandom(3 * 1024), qber=0.041)]})
    assert r.status_code == 200, r.text
    pool = api(station)("ops-ada").get("/api/v1/links/link-a/pool").json()
    assert pool["qber"] == pytest.approx((3 * 1024 * 0.021 + 3 * 1024 * 0.041) / (6 * 1024))


def test_binary_blocks_and_harmless_resend(station, api) -> None:
    mod = api(station)("mod-link-a")
    now = datetime.now(UTC)
    blocks = [LinkBlock(str(uuid.uuid4()), os.urandom(4096), 0.03, 1e-9, now) for _ in range(5)]
    body = encode_binary(blocks)  # the SDK's encoder, as QKD modules use it
    headers = {"content-type": "application/octet-stream"}
    r = mod.post(URL, content=body, headers=headers)
    assert r.status_code == 200, r.text
    assert r.json()["accepted"] == 5
    before = snapshot(station.ctx)
    r = mod.post(URL, content=body, headers=headers)  # the module retries the same batch
    assert r.json() == {"link_id": "link-a", "accepted": 0, "duplicates": 5, "accepted_bits": 0}
    after = snapshot(station.ctx)
    assert after["link_block"] == before["link_block"]


def test_same_id_with_other_bytes_is_refused_and_recorded(station, api) -> None:
    mod = api(station)("mod-link-a")
    first = _json_block(os.urandom(256))
    assert mod.post(URL, json={"blocks": [first]}).status_code == 200
    before = snapshot(station.ctx)
    fresh = _json_block(os.urandom(256))
    forged = _json_block(os.urandom(256), block_id=first["block_id"])
    r = mod.post(URL, json={"blocks": [fresh, forged]})
    assert r.status_code == 409
    assert r.json()["details"] == [{"block_id": first["block_id"]}]
    after = snapshot(station.ctx)
    assert after["link_block"] == before["link_block"]  # the fresh block was not kept either
    assert ledger_events(station.ctx)[-1] == "link_key.refused"
    # The same conflict inside one request.
    twin_id = str(uuid.uuid4())
    r = mod.post(
        URL, json={"blocks": [_json_block(b"a" * 32, twin_id), _json_block(b"b" * 32, twin_id)]}
    )
    assert r.status_code == 409


def test_module_of_another_link_is_refused(station, api) -> None:
    r = api(station)("mod-link-b").post(URL, json={"blocks": [_json_block(os.urandom(32))]})
    assert r.status_code == 403


def test_link_not_ending_here_is_not_found(station, api) -> None:
    r = api(station)("mod-link-b").post(
        "/api/v1/links/link-b/blocks", json={"blocks": [_json_block(os.urandom(32))]}
    )
    assert r.status_code == 404


def test_bad_blocks_change_nothing(station, api) -> None:
    mod = api(station)("mod-link-a")
    before = snapshot(station.ctx)
    future = (datetime.now(UTC) + timedelta(hours=1)).isoformat()
    cases = [
        ({"blocks": []}, 400),
        ({"blocks": [_json_block(b"k" * 32, block_id="not-a-uuid")]}, 400),
        ({"blocks": [_json_block(b"k" * 32) | {"key": "***"}]}, 400),
        ({"blocks": [_json_block(b"k" * 32, qber=0.7)]}, 400),
        ({"blocks": [_json_block(b"k" * 32, qber=True)]}, 400),
        ({"blocks": [_json_block(b"k" * 32, epsilon=1.5)]}, 400),
        ({"blocks": [_json_block(b"k" * 32, produced_at=future)]}, 400),
        ({"blocks": [_json_block(b"k" * 32, produced_at="2026-12-01T10:00:00")]}, 400),
        ({"blocks": [_json_block(b"k" * 32, colour="red")]}, 400),
    ]
    for body, status in cases:
        r = mod.post(URL, json=body)
        assert r.status_code == status, (body, r.text)
        assert "message" in r.json()
    binary = {"content-type": "application/octet-stream"}
    record = encode_binary([LinkBlock(str(uuid.uuid4()), b"k" * 64, 0.01, 1e-9, datetime.now(UTC))])
    for body in (
        record[:30],
        record[:-1],
        b"\x02" + record[1:],
        record[:41] + struct.pack(">I", 2**31) + record[45:],
    ):
        r = mod.post(URL, content=body, headers=binary)
        assert r.status_code == 400, r.text
    r = mod.post(URL, content=b"x", headers={"content-type": "text/plain"})
    assert r.status_code == 415
    assert snapshot(station.ctx)["link_block"] == before["link_block"]


def test_error_bodies_never_echo_key_bytes(station, api) -> None:
    mod = api(station)("mod-link-a")
    secret = os.urandom(48)
    encoded = base64.b64encode(secret).decode()
    r = mod.post(URL, json={"blocks": [_json_block(secret, qber="high")]})
    assert r.status_code == 400
    assert encoded not in r.text
    assert secret.hex() not in r.text


def test_pools_list_every_link_ending_here(relay, api) -> None:
    pools = api(relay)("aud-ben").get("/api/v1/links/pools").json()
    assert pools["node_id"] == "relay-1"
    assert [p["link_id"] for p in pools["pools"]] == ["link-a", "link-b"]
    assert all(p["bits_available"] == 0 and p["last_block_at"] is None for p in pools["pools"])
