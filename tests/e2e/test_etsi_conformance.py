"""Conformance with ETSI GS QKD 014 V1.1.1 (2019-02), "Quantum Key Distribution (QKD);
Protocol and data format of REST-based key delivery API".

Every check names the part of the standard it follows. The standard's text is not at
hand here: clause numbers, table contents and wording are cited FROM MEMORY (the base
URL and methods in clause 5, the data formats in clause 6). The checks run against a
real node over mutual TLS on loopback, with two general-purpose clients: httpx and curl
(from the OS packages); and against the app's own OpenAPI document.
"""

from __future__ import annotations

import base64
import binascii
import json
import shutil
import subprocess
import time
import uuid
from collections.abc import Iterator
from typing import Any

import httpx
import pytest

from keystrata.loopback.pki import PkiFiles

# Clause 6.1 (from memory): the Status object's members and their JSON types.
STATUS_MEMBERS = {
    "source_KME_ID": str,
    "target_KME_ID": str,
    "master_SAE_ID": str,
    "slave_SAE_ID": str,
    "key_size": int,
    "stored_key_count": int,
    "max_key_count": int,
    "max_key_per_request": int,
    "max_key_size": int,
    "min_key_size": int,
    "max_SAE_ID_count": int,
}
STATUS_OPTIONAL = {"status_extension"}
# Clause 6.3 (from memory): Key container = {"keys": [{key_ID, key_ID_extension?, key,
# key_extension?}], key_container_extension?}.
KEY_MEMBERS = {"key_ID", "key"}
KEY_OPTIONAL = {"key_ID_extension", "key_extension"}
# Clause 6.5 (from memory): Error = {"message", "details"?}.
ERROR_MEMBERS = {"message"}
ERROR_OPTIONAL = {"details"}


class Station:
    """One SAE's view of its station: requests through httpx or curl, same checks."""

    def __init__(self, url: str, pki: PkiFiles, sae: str, tool: str) -> None:
        self.url, self.pki, self.sae, self.tool = url, pki, sae, tool

    def call(self, method: str, path: str, body: Any = None) -> tuple[int, Any, str]:
        """Return (status, decoded JSON, content type)."""
        if self.tool == "curl":
            return self._curl(method, path, body)
        import ssl

        ctx = ssl.create_default_context(cafile=str(self.pki.ca))
        ctx.load_cert_chain(str(self.pki.cert(self.sae)), str(self.pki.key(self.sae)))
        r = httpx.request(method, self.url + path, json=body, verify=ctx, timeout=10)
        return r.status_code, r.json(), r.headers.get("content-type", "")

    def _curl(self, method: str, path: str, body: Any) -> tuple[int, Any, str]:
        cmd = [
            "curl",
            "-sS",
            "-X",
            method,
            "--cacert",
            str(self.pki.ca),
            "--cert",
            str(self.pki.cert(self.sae)),
            "--key",
            str(self.pki.key(self.sae)),
            "-w",
            "\n%{http_code}\n%{content_type}",
            self.url + path,
        ]
        if body is not None:
            cmd += ["-H", "Content-Type: application/json", "--data-binary", json.dumps(body)]
        out = subprocess.run(cmd, capture_output=True, text=True, timeout=30, check=True)
        text, status, ctype = out.stdout.rsplit("\n", 2)
        return int(status), json.loads(text), ctype


@pytest.fixture(scope="module")
def network(tmp_path_factory, pki) -> Iterator[dict[str, str]]:
    """A relay and two stations (SQLite), with ready pair key; returns node URLs."""
    from keystrata.loopback.network import NETWORK, feed_links, start_network
    from keystrata.loopback.processes import stop_all

    base = tmp_path_factory.mktemp("etsi")
    extra = "\n[relay]\nsegment_bytes = 4096\nmin_segment_bytes = 512\ncycle_seconds = 0.1\n"
    nodes = start_network(
        base, pki, {n: f"sqlite:///{base}/{n}.db" for n in NETWORK}, extra=extra, saes=True
    )
    try:
        feed_links(nodes, pki, 40)
        urls = {n: node.url for n, node in nodes.items()}
        a = Station(urls["station-a"], pki, "sae-a1", "httpx")
        deadline = time.monotonic() + 60
        while a.call("GET", "/api/v1/keys/sae-b1/status")[1].get("stored_key_count", 0) < 32:
            assert time.monotonic() < deadline, "no ready key at station-a"
            time.sleep(0.1)
        yield urls
    finally:
        stop_all(list(nodes.values()))


TOOLS = [
    "httpx",
    pytest.param(
        "curl",
        marks=pytest.mark.skipif(shutil.which("curl") is None, reason="curl is not installed"),
    ),
]


@pytest.mark.parametrize("tool", TOOLS)
def test_get_status(network, pki, tool) -> None:
    st = Station(network["station-a"], pki, "sae-a1", tool)
    status, body, ctype = st.call("GET", "/api/v1/keys/sae-b1/status")
    assert status == 200  # clause 5.2: 200 with a Status object (from memory)
    assert ctype.startswith("application/json")  # clause 5.1: JSON (from memory)
    assert set(body) - STATUS_OPTIONAL == set(STATUS_MEMBERS)
    # Optional members are left out when absent, not written as null (clause 6.1 marks
    # status_extension optional; from memory).
    assert None not in body.values()
    for name, kind in STATUS_MEMBERS.items():
        assert type(body[name]) is kind, name  # exact JSON types; bool is not an integer
    assert body["source_KME_ID"] == "station-a" and body["target_KME_ID"] == "station-b"
    assert body["master_SAE_ID"] == "sae-a1" and body["slave_SAE_ID"] == "sae-b1"
    assert body["min_key_size"] <= body["key_size"] <= body["max_key_size"]


def _check_container(body: dict[str, Any], number: int, size_bits: int) -> dict[str, bytes]:
    assert set(body) <= {"keys", "key_container_extension"}  # clause 6.3 (from memory)
    assert None not in body.values()  # an absent optional member is left out
    keys = {}
    for entry in body["keys"]:
        assert KEY_MEMBERS <= set(entry) <= KEY_MEMBERS | KEY_OPTIONAL
        assert None not in entry.values()
        # key_ID: a UUID in its string form (RFC 9562 section 4; the standard names UUIDs
        # for key IDs, from memory).
        assert str(uuid.UUID(entry["key_ID"])) == entry["key_ID"].lower()
        # key: Base64 (RFC 4648 section 4), padded, strictly decodable.
        try:
            raw = base64.b64decode(entry["key"], validate=True)
        except binascii.Error as exc:  # pragma: no cover - the assertion explains
            raise AssertionError("key is not RFC 4648 Base64") from exc
        assert len(raw) * 8 == size_bits
        keys[entry["key_ID"]] = raw
    assert len(keys) == number
    return keys


@pytest.mark.parametrize("tool", TOOLS)
@pytest.mark.parametrize("form", ["POST", "GET"])
def test_get_key_and_get_key_with_key_ids(network, pki, tool, form) -> None:
    a = Station(network["station-a"], pki, "sae-a1", tool)
    b = Station(network["station-b"], pki, "sae-b1", tool)
    if form == "POST":  # clause 5.3: POST with a Key request body (from memory)
        status, body, _ = a.call("POST", "/api/v1/keys/sae-b1/enc_keys", {"number": 2, "size": 256})
    else:  # clause 5.3: GET with number and size as query parameters (from memory)
        status, body, _ = a.call("GET", "/api/v1/keys/sae-b1/enc_keys?number=2&size=256")
    assert status == 200, body
    master = _check_container(body, 2, 256)
    got: dict[str, bytes] = {}
    deadline = time.monotonic() + 20
    for key_id in master:
        while True:
            if form == "POST":  # clause 5.4: POST with a Key IDs body (from memory)
                status, body, _ = b.call(
                    "POST", "/api/v1/keys/sae-a1/dec_keys", {"key_IDs": [{"key_ID": key_id}]}
                )
            else:  # clause 5.4: GET with one key_ID query parameter (from memory)
                status, body, _ = b.call("GET", f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_id}")
            if status == 200 or time.monotonic() > deadline:
                break
            time.sleep(0.2)
        assert status == 200, body
        got.update(_check_container(body, 1, 256))
    assert got == master  # master and slave hold byte-identical keys
    # The key is one-time: a second request for the same ID is refused.
    status, body, _ = b.call("GET", f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_id}")
    assert status == 401  # clause 5.4: 401 Unauthorized (from memory)
    assert ERROR_MEMBERS <= set(body) <= ERROR_MEMBERS | ERROR_OPTIONAL  # clause 6.5


@pytest.mark.parametrize("tool", TOOLS)
def test_get_key_post_without_a_body(network, pki, tool) -> None:
    """Clause 6.2 (from memory): every member of the Key request is optional, so a POST
    with no body at all (curl -X POST sends neither a body nor a content type) asks for
    one key of the Status's key_size."""
    a = Station(network["station-a"], pki, "sae-a1", tool)
    size = a.call("GET", "/api/v1/keys/sae-b1/status")[1]["key_size"]
    status, body, _ = a.call("POST", "/api/v1/keys/sae-b1/enc_keys")
    assert status == 200, body
    _check_container(body, 1, size)


@pytest.mark.parametrize("tool", TOOLS)
def test_error_codes_and_object(network, pki, tool) -> None:
    a = Station(network["station-a"], pki, "sae-a1", tool)
    cases = [
        ("POST", "/api/v1/keys/sae-b1/enc_keys", {"size": 100}, 400),  # not a multiple of 8
        ("POST", "/api/v1/keys/sae-b1/enc_keys", {"number": "2"}, 400),  # wrong JSON type
        (
            "POST",
            "/api/v1/keys/sae-b1/enc_keys",
            {"extension_mandatory": [{"x_route": 1}]},
            400,
        ),  # unsupported mandatory extension
        (
            "POST",
            "/api/v1/keys/sae-b1/enc_keys",
            {"extension_optional": [{"x_hint": 1}]},
            200,
        ),  # optional extensions are ignored
        # Clause 6.2 (from memory): every member of the Key request is optional; members
        # it does not name are ignored (clients of other makers send some).
        ("POST", "/api/v1/keys/sae-b1/enc_keys", {"x_vendor": {"a": 1}, "number": 1}, 200),
        ("POST", "/api/v1/keys/nobody/enc_keys", {}, 401),
        ("POST", "/api/v1/keys/sae-b1/dec_keys", {"key_IDs": [{"key_ID": str(uuid.uuid4())}]}, 401),
    ]
    for method, path, body, expected in cases:
        status, answer, ctype = a.call(method, path, body)
        assert status == expected, (path, body, answer)  # clause 5: 200/400/401/503
        assert ctype.startswith("application/json")
        assert None not in answer.values()  # absent optional members are left out
        if status != 200:
            assert ERROR_MEMBERS <= set(answer) <= ERROR_MEMBERS | ERROR_OPTIONAL
            assert isinstance(answer["message"], str)
            assert isinstance(answer.get("details", []), list)


def test_openapi_document_has_the_standards_shapes(station) -> None:
    """The app's OpenAPI document describes the routes with the standard's objects."""
    from keystrata.server import compose

    doc = compose(station.ctx).openapi()
    paths = doc["paths"]
    assert set(paths["/api/v1/keys/{slave_SAE_ID}/status"]) == {"get"}
    assert set(paths["/api/v1/keys/{slave_SAE_ID}/enc_keys"]) == {"get", "post"}
    assert set(paths["/api/v1/keys/{master_SAE_ID}/dec_keys"]) == {"get", "post"}
    schemas = doc["components"]["schemas"]
    assert set(schemas["Status"]["properties"]) == set(STATUS_MEMBERS) | STATUS_OPTIONAL
    assert set(schemas["KeyRequest"]["properties"]) == {
        "number",
        "size",
        "additional_slave_SAE_IDs",
        "extension_mandatory",
        "extension_optional",
    }  # clause 6.2 (from memory)
    assert set(schemas["KeyIds"]["properties"]) == {"key_IDs", "key_IDs_extension"}
    assert set(schemas["KeyContainer"]["properties"]) == {"keys", "key_container_extension"}
    assert set(schemas["KeyEntry"]["properties"]) == KEY_MEMBERS | KEY_OPTIONAL
    assert set(schemas["ErrorBody"]["properties"]) == {"message", "details"}
    for path in ("/api/v1/keys/{slave_SAE_ID}/enc_keys", "/api/v1/keys/{master_SAE_ID}/dec_keys"):
        for op in paths[path].values():
            assert {"200", "400", "401", "503"} <= set(op["responses"])


def test_only_the_named_slave_fetches_and_the_cli_works(network, pki) -> None:
    """Over real processes: a third SAE, or the master itself, cannot fetch the slave's
    key; the `keystrata keys` commands drive the same calls (printing digests only)."""
    from keystrata.loopback.processes import run_cli

    def env(station: str, sae: str) -> dict[str, str]:
        return {
            "KEYSTRATA_URL": network[station],
            "KEYSTRATA_CA": str(pki.ca),
            "KEYSTRATA_CERT": str(pki.cert(sae)),
            "KEYSTRATA_KEY": str(pki.key(sae)),
        }

    got = json.loads(
        run_cli(
            "keys",
            "get",
            "sae-b1",
            "--number",
            "1",
            "--size",
            "128",
            "--json",
            env=env("station-a", "sae-a1"),
        ).stdout
    )
    key_ids = _find_key_ids(got)
    assert len(key_ids) == 1
    (key_id,) = key_ids
    for intruder in ("sae-b2", "sae-a1"):
        st = Station(network["station-b"], pki, intruder, "httpx")
        status, body, _ = st.call("GET", f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_id}")
        assert status == 401, (intruder, body)
    deadline = time.monotonic() + 20
    while True:
        out = run_cli(
            "keys", "get-by-id", "sae-a1", key_id, env=env("station-b", "sae-b1"), check=False
        )
        if out.returncode == 0 or time.monotonic() > deadline:
            break
        time.sleep(0.3)
    assert out.returncode == 0, out.stderr
    assert key_id in out.stdout


def _find_key_ids(obj: Any) -> list[str]:
    """Key IDs anywhere in the CLI's JSON answer."""
    found: list[str] = []
    if isinstance(obj, dict):
        for k, v in obj.items():
            if k in ("key_ID", "key_id") and isinstance(v, str):
                found.append(v)
            else:
                found += _find_key_ids(v)
    elif isinstance(obj, list):
        for v in obj:
            found += _find_key_ids(v)
    return found
