"""Key delivery is lenient where ETSI GS QKD 014 V1.1.1 (2019-02) leaves room, and strict
where it does not (clause numbers and wording from memory):

* every member of the Key request is optional (clause 6.2), so a Get key POST with no
  body at all, whatever its content headers, is the default request;
* members the standard does not name are ignored in request bodies (clients of other
  makers send some): they are dropped while the body is read and reach no ledger entry,
  no row, no log line and no answer;
* answers leave absent optional members out (Status, Key container, the Error object)
  instead of writing ``null``: the standard marks them optional, not nullable;
* what must be refused still is (an ``extension_mandatory`` entry, bad sizes, too many
  additional slaves: tests/api/test_delivery.py).

In process against the ASGI app, with real databases.
"""

from __future__ import annotations

import json
import logging
from typing import Any

import pytest

import relaynet
from helpers import decoded_keys, ledger_entries, snapshot

GET_KEY = "/api/v1/keys/sae-b1/enc_keys"
STATUS = "/api/v1/keys/sae-b1/status"
#: A string no request of this test sends except inside members the standard does not
#: name (their names and their values).
MARKER = "zq-marker-7c41d9e2-unknown-member"


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    return relaynet.with_ready_key(make_node, db_factory)


def _default_key_size(net: relaynet.RelayNet, api: Any) -> int:
    r = api(net.a)("sae-a1").get(STATUS)
    assert r.status_code == 200, r.text
    size = r.json()["key_size"]
    assert isinstance(size, int)
    return size


@pytest.mark.parametrize(
    "headers",
    [
        {},  # httpx sends Content-Length: 0 and no content type
        {"content-type": "application/json"},
        {"content-length": "0"},
    ],
    ids=["no-headers", "json-content-type", "content-length-0"],
)
def test_get_key_post_without_a_body_is_the_default_request(net, api, headers) -> None:
    # Clause 6.2 (from memory): number (default 1) and size (default: the key_size of
    # Status) are optional, as is every other member; no body asks for the defaults.
    size = _default_key_size(net, api)
    r = api(net.a)("sae-a1").post(GET_KEY, content=b"", headers=headers)
    assert r.status_code == 200, r.text
    keys = decoded_keys(r.json())
    assert len(keys) == 1 and [8 * len(k) for k in keys.values()] == [size]


def test_get_key_post_with_json_but_no_content_type_is_read(net, api) -> None:
    body = json.dumps({"number": 2, "size": 256}).encode()
    r = api(net.a)("sae-a1").post(GET_KEY, content=body)
    assert "content-type" not in r.request.headers
    assert r.status_code == 200, r.text
    assert [len(k) for k in decoded_keys(r.json()).values()] == [32, 32]


def test_a_body_that_is_not_json_is_still_400_and_changes_nothing(net, api) -> None:
    before = snapshot(net.a.ctx)
    for content, headers in (
        (b"number=2", {"content-type": "application/x-www-form-urlencoded"}),
        (b"{not json", {}),
        (b"null", {"content-type": "application/json"}),
        (b"[]", {"content-type": "application/json"}),
    ):
        r = api(net.a)("sae-a1").post(GET_KEY, content=content, headers=headers)
        assert r.status_code == 400, (content, r.text)
        assert set(r.json()) <= {"message", "details"}
    assert _without_ledger(snapshot(net.a.ctx)) == _without_ledger(before)


def _without_ledger(tables: dict[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in tables.items() if not k.startswith("ledger")}


def _cells(tables: dict[str, list[tuple[Any, ...]]]) -> list[str]:
    out = []
    for table, rows in tables.items():
        for row in rows:
            for cell in row:
                if isinstance(cell, bytes):
                    out.append(f"{table}: {cell.decode('latin-1')}")
                elif cell is not None:
                    out.append(f"{table}: {cell}")
    return out


def test_unknown_members_are_ignored_and_stored_nowhere(
    net, api, caplog: pytest.LogCaptureFixture
) -> None:
    """Attack and compatibility test at once: a client puts a marker (it might as well be
    a secret or a payload) into members the standard does not name, at every level of
    both request bodies. The requests are served, and the marker is in no ledger entry,
    no row of either station, no log record and no answer."""
    caplog.set_level(logging.DEBUG)
    for name in ("keystrata", "sqlalchemy.engine"):
        caplog.set_level(logging.DEBUG, logger=name)
    a1, b1 = api(net.a)("sae-a1"), api(net.b)("sae-b1")
    request = {
        "number": 2,
        "size": 256,
        "x_vendor_option": MARKER,
        MARKER: {"nested": MARKER},
        "extension_optional": [{"x_hint": MARKER}],
    }
    r = a1.post(GET_KEY, json=request)
    assert r.status_code == 200, r.text
    answers = [r.content]
    keys = decoded_keys(r.json())
    assert len(keys) == 2
    net.drain()
    ids = {
        "key_IDs": [{"key_ID": k, "x_vendor_tag": MARKER} for k in keys],
        "key_IDs_extension": {"x": MARKER},
        MARKER: 1,
    }
    r = b1.post("/api/v1/keys/sae-a1/dec_keys", json=ids)
    assert r.status_code == 200, r.text
    assert decoded_keys(r.json()) == keys
    answers.append(r.content)
    # The GET form takes no body; unknown query parameters are ignored the same way.
    r = a1.get(f"{GET_KEY}?number=1&x_vendor={MARKER}")
    assert r.status_code == 200, r.text
    answers.append(r.content)

    found: list[str] = []
    for node in (net.a, net.b):
        entries = ledger_entries(node.ctx.db)
        found += [f"{node.ctx.node_id} ledger" for e in entries if MARKER.encode() in e]
        found += [c for c in _cells(snapshot(node.ctx)) if MARKER in c]
    found += [f"answer {i}" for i, body in enumerate(answers) if MARKER.encode() in body]
    # The test's own HTTP client logs the URL it sent: the caller's side, not the node's.
    node_records = [r for r in caplog.records if not r.name.startswith(("httpx", "httpcore"))]
    assert node_records, "the node logged nothing"
    found += [
        f"log {rec.name}"
        for rec in node_records
        if MARKER in rec.getMessage() or MARKER in repr(rec.args)
    ]
    assert not found, found


def _no_nulls(obj: Any, where: str = "answer") -> None:
    """Absent optional members are left out, never written as null (anywhere)."""
    if isinstance(obj, dict):
        for name, value in obj.items():
            assert value is not None, f"{where}.{name} is null"
            _no_nulls(value, f"{where}.{name}")
    elif isinstance(obj, list):
        for i, value in enumerate(obj):
            _no_nulls(value, f"{where}[{i}]")


def test_answers_leave_absent_members_out(net, api) -> None:
    a1, b1 = api(net.a)("sae-a1"), api(net.b)("sae-b1")
    status = a1.get(STATUS)
    assert status.status_code == 200
    _no_nulls(status.json())
    assert "status_extension" not in status.json()  # clause 6.1 (from memory): optional
    containers = [
        a1.post(GET_KEY, json={"number": 2, "size": 256}),
        a1.get(f"{GET_KEY}?number=1&size=256"),
    ]
    for r in containers:
        assert r.status_code == 200, r.text
        _no_nulls(r.json())
        # Clause 6.3 (from memory): key_container_extension, key_ID_extension and
        # key_extension are optional members.
        assert set(r.json()) == {"keys"}
        assert all(set(k) == {"key_ID", "key"} for k in r.json()["keys"])
    net.drain()
    key_ids = [k["key_ID"] for r in containers for k in r.json()["keys"]]
    r = b1.post("/api/v1/keys/sae-a1/dec_keys", json={"key_IDs": [{"key_ID": key_ids[0]}]})
    assert r.status_code == 200, r.text
    assert set(r.json()) == {"keys"} and set(r.json()["keys"][0]) == {"key_ID", "key"}
    r = b1.get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_ids[1]}")
    assert r.status_code == 200, r.text
    assert set(r.json()) == {"keys"} and set(r.json()["keys"][0]) == {"key_ID", "key"}
    # Clause 6.5 (from memory): the Error object's details are optional.
    for refused in (
        b1.get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_ids[1]}"),  # already fetched: 401
        a1.post(GET_KEY, json={"size": 100}),  # 400 with details
        a1.post(GET_KEY, json={"number": 10**6}),  # 400
    ):
        assert refused.status_code in (400, 401), refused.text
        _no_nulls(refused.json(), "error")
        assert set(refused.json()) <= {"message", "details"}
    assert b1.get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_ids[1]}").json() == {
        "message": "unauthorized"
    }


def test_the_openapi_document_marks_answer_members_optional_not_nullable(station) -> None:
    """What the answers do is what the document says: optional members of the answers
    are objects when present, never null; request members stay optional (and null is
    taken there, as absent)."""
    from keystrata.server import compose

    doc = compose(station.ctx).openapi()
    schemas = doc["components"]["schemas"]

    def nullable(schema: dict[str, Any]) -> bool:
        return schema.get("type") == "null" or any(
            nullable(s) for s in schema.get("anyOf", []) + schema.get("oneOf", [])
        )

    for model, member in (
        ("Status", "status_extension"),
        ("KeyContainer", "key_container_extension"),
        ("KeyEntry", "key_ID_extension"),
        ("KeyEntry", "key_extension"),
        ("ErrorBody", "details"),
    ):
        assert member not in schemas[model].get("required", []), (model, member)
        assert not nullable(schemas[model]["properties"][member]), (model, member)
    assert not schemas["KeyRequest"].get("required")
    body = doc["paths"][GET_KEY.replace("sae-b1", "{slave_SAE_ID}")]["post"]["requestBody"]
    assert body.get("required") is not True  # the body itself may be absent
