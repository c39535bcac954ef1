"""Hostile input: schemathesis over every operation of the node's OpenAPI document, run
in-process against the ASGI app with a fixed seed, plus targeted cases for strict input
types and for the one body the document does not describe (peer messages).

Each request carries the client certificate of a role the route admits (read from the
app's own route table), so generated input reaches validation instead of being refused
at the door. What must hold for every answer:

- no 5xx, except the 503 answers the key delivery routes document (no ready key, quota
  spent, a key ID whose allocation cannot be fetched from the master's station yet);
- the status is one the operation documents by number, and the body matches the
  documented schema (schemathesis' response checks);
- every error body is the error object ``{"message", "details"?}``, nothing else;
- JSON bodies are typed strictly: ``true`` is not a number and ``"1"`` is not an integer.

Both backends run (SQLite and PostgreSQL: NUL characters and lone surrogates only break
the latter). Where the service does not yet do what the checks expect, a test marked
``xfail(strict=True)`` names the defect, so fixing it turns that test red until the
marker goes.
"""

from __future__ import annotations

import base64
import os
import shutil
import urllib.parse
from collections.abc import Iterator
from typing import Any

import httpx
import hypothesis
import pytest
import schemathesis
from anyio.from_thread import start_blocking_portal
from fastapi.openapi.utils import get_openapi
from hypothesis import strategies as st
from starlette.routing import Match

from conftest import PG_URL, AsgiClient, Node, _pg_admin, _pg_url, seed_registry
from helpers import snapshot
from keystrata.api.app import route_table
from keystrata.config import load_settings
from keystrata.loopback.configs import write_config
from keystrata.loopback.pki import PkiFiles
from keystrata.node.lifecycle import initialise, load_keyring, open_node
from keystrata.registry import provisioning
from keystrata.registry.specs import Kind, PairSpec, PrincipalRole
from keystrata.server import compose
from keystrata.storage.db import Database

#: The test certificate used for each role (conftest.CLIENTS), in order of preference
#: when a route admits several roles.
CERT_OF_ROLE = {
    PrincipalRole.OPERATOR: "ops-ada",
    PrincipalRole.AUDITOR: "aud-ben",
    PrincipalRole.SAE: "sae-a1",
    PrincipalRole.QKD_MODULE: "mod-link-a",
    PrincipalRole.PEER: "peer-relay",
    PrincipalRole.MONITOR: "mon-cal",
}

#: The only 5xx answers given on purpose: ETSI GS QKD 014's 503 ("error on the server
#: side") when Get key finds too little ready key or the pair's quota spent, and when Get
#: key with key IDs cannot reach the master's station to learn of a key ID
#: (DEVELOPERS.md, "Key delivery"). Operation ID -> phrases of those messages.
ALLOWED_503: dict[str, tuple[str, ...]] = {
    "get_key": ("bits asked for are ready", "quota"),
    "get_key_simple": ("bits asked for are ready", "quota"),
    "get_key_with_key_ids": ("has not reached this station yet",),
    "get_key_with_key_id_simple": ("has not reached this station yet",),
}


def _admitted(scope: dict[str, Any]) -> set[PrincipalRole]:
    for route in route_table():
        match, _ = route.matches(scope)
        if match is Match.FULL:
            roles: set[PrincipalRole] = set()
            for dep in route.dependant.dependencies:
                roles |= getattr(dep.call, "roles", frozenset())
            return roles
    return set()


class AsAdmittedCaller:
    """ASGI stand-in for keystrata's TLS layer (``api/tls.py``): every request gets the
    client certificate of a role its route admits, in the scope's TLS extension.

    It answers the lifespan protocol itself, so the node's background workers (outbox,
    scheduler) do not start: the test node has no peers to talk to.
    """

    def __init__(self, app: Any, pki: PkiFiles) -> None:
        self.app = app
        self.pems = {role: pki.pem(name) for role, name in CERT_OF_ROLE.items()}

    def role_for(self, scope: dict[str, Any]) -> PrincipalRole:
        admitted = _admitted(scope)
        return next((r for r in CERT_OF_ROLE if r in admitted), PrincipalRole.OPERATOR)

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        if scope["type"] == "lifespan":
            while True:
                message = await receive()
                if message["type"] == "lifespan.startup":
                    await send({"type": "lifespan.startup.complete"})
                elif message["type"] == "lifespan.shutdown":
                    await send({"type": "lifespan.shutdown.complete"})
                    return
        if scope["type"] == "http":
            pem = self.pems[self.role_for(scope)]
            scope["extensions"] = {
                **(scope.get("extensions") or {}),
                "tls": {"client_cert_chain": [pem]},
            }
        await self.app(scope, receive, send)


def openapi_document() -> dict[str, Any]:
    """The node's OpenAPI document, built from the same route table as the app's own
    ``/openapi.json`` (``test_document_is_the_apps_own`` holds them equal)."""
    return get_openapi(title="keystrata node", version="test", routes=route_table())


# ---------------------------------------------------------------- the schemathesis run

#: Generated path parameters are half random, half these entries of the seeded registry,
#: so that requests also get past "no such entry" to the use cases behind them.
#: Registry entries that generated DELETE and PATCH calls may change are ones no
#: caller of this test depends on.
KNOWN_PATH_VALUES: dict[str, str] = {
    "slave_SAE_ID": "sae-c1",
    "master_SAE_ID": "sae-c1",
    "link_id": "link-a",
    "pair_id": "pair-ac",
}
KNOWN_ENTRY: dict[str, str] = {
    "/api/v1/registry/nodes/": "station-b",
    "/api/v1/registry/links/": "link-b",
    "/api/v1/registry/pairs/": "pair-bc",
    "/api/v1/registry/principals/": "mon-cal",
}

CONFIG = schemathesis.Config.from_dict(
    {
        "seed": 20261202,
        "generation": {
            "mode": "all",  # schema-valid and schema-violating input
            "deterministic": True,
            "max-examples": 5,
            "database": "none",
            "allow-x00": True,  # PostgreSQL cannot store NUL in text: it must be a 400
        },
        "cache": {"enabled": False},
        "checks": {
            # "Schema-valid input is accepted" does not hold here by design: rules across
            # fields (a link's two ends differ), the node's state (an index below the
            # ledger's size) and the binary block format are checked by the service,
            # and answered 400 with the error object, which the checks below verify.
            "positive_data_acceptance": {"enabled": False},
        },
        "operations": [
            {
                # Which 503 answers are allowed is checked by _error_object below.
                "include-operation-id": sorted(ALLOWED_503),
                "checks": {"not_a_server_error": {"expected-statuses": ["2xx", "4xx", "503"]}},
            },
        ],
    }
)
schema = schemathesis.openapi.from_dict(openapi_document(), config=CONFIG)


@schema.hook
def flatmap_path_parameters(context: Any, path_parameters: dict[str, Any]) -> Any:
    if not isinstance(path_parameters, dict) or not path_parameters:
        return st.just(path_parameters)
    path = context.operation.path if context.operation else ""
    known = dict(path_parameters)
    for name in known:
        if name == "entry_id":
            known[name] = next(v for p, v in KNOWN_ENTRY.items() if path.startswith(p))
        elif name in KNOWN_PATH_VALUES:
            known[name] = KNOWN_PATH_VALUES[name]
    return st.sampled_from([path_parameters, known])


def _explicitly_documented(ctx: Any, response: Any, case: Any) -> bool | None:
    """The status is listed by number (the ``4XX`` entry only tells clients that any
    other client error has the same body; keystrata documents each one it gives)."""
    if case.method.upper() != case.operation.method.upper():
        return None  # a probe with a method the path does not have (405)
    documented = set(case.operation.definition.raw.get("responses", {}))
    assert str(response.status_code) in documented, (
        f"{case.method} {case.operation.path}: {response.status_code} is not documented "
        f"by number (documented: {sorted(documented)})"
    )
    return True


def _error_object(ctx: Any, response: Any, case: Any) -> bool | None:
    """Every error answer is the JSON error object and nothing else."""
    if response.status_code < 400:
        return None
    body = response.json()
    assert isinstance(body, dict), body
    assert set(body) <= {"message", "details"}, body
    assert isinstance(body.get("message"), str) and body["message"], body
    details = body.get("details")
    assert details is None or (
        isinstance(details, list) and all(isinstance(d, dict) for d in details)
    ), body
    if response.status_code >= 500:
        phrases = ALLOWED_503.get(case.operation.definition.raw.get("operationId"), ())
        assert response.status_code == 503, body
        assert any(p in body["message"] for p in phrases), body
    return True


CUSTOM_CHECKS = [_explicitly_documented, _error_object]


@pytest.fixture(scope="module", params=["sqlite", "postgresql"])
def hostile_node(
    request: pytest.FixtureRequest, pki: PkiFiles, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[Node]:
    """Station ``station-a`` with the test network provisioned (as the ``station``
    fixture), one per backend for the whole module: the operations' runs share it, so
    hostile traffic accumulates. Also pair-bc, which generated calls may change."""
    folder = tmp_path_factory.mktemp(f"hostile-{request.param}")
    dbname = None
    if request.param == "postgresql":
        template = request.getfixturevalue("pg_template")
        if template is None:
            pytest.skip(f"no PostgreSQL at {PG_URL} (set CI=1 to make this a failure)")
        dbname = f"ks_hostile_{os.getpid()}"
        with _pg_admin() as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{dbname}" WITH (FORCE)')
            admin.execute(f'CREATE DATABASE "{dbname}" TEMPLATE "{template}"')
        url = _pg_url(dbname)
    else:
        path = folder / "station-a.db"
        shutil.copy(request.getfixturevalue("sqlite_template"), path)
        url = f"sqlite:///{path}"
    config = write_config(folder, node_id="station-a", role="station", db_url=url, pki=pki)
    settings = load_settings(config, env={})
    db = Database.from_url(settings.database.url, sqlite_synchronous="NORMAL")
    initialise(settings, db, load_keyring(settings))
    node = Node(settings=settings, config_path=config, ctx=open_node(settings, db))
    seed_registry(node.ctx)
    provisioning.create(
        node.ctx,
        Kind.PAIRS,
        PairSpec(pair_id="pair-bc", relay_id="relay-1", stations=["station-b", "station-c"]),
        actor="test",
    )
    yield node
    db.dispose()
    if dbname is not None:
        with _pg_admin() as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{dbname}" WITH (FORCE)')


@pytest.fixture(scope="module")
def target(hostile_node: Node, pki: PkiFiles) -> Iterator[AsAdmittedCaller]:
    yield AsAdmittedCaller(compose(hostile_node.ctx), pki)
    from schemathesis.python import asgi

    asgi.shutdown_lifespans()


@schema.parametrize()
@hypothesis.settings(
    deadline=None,
    # One node serves the whole run on purpose: hostile traffic accumulates state.
    suppress_health_check=[
        hypothesis.HealthCheck.function_scoped_fixture,
        hypothesis.HealthCheck.too_slow,
        hypothesis.HealthCheck.filter_too_much,
    ],
)
def test_every_route(case: Any, target: AsAdmittedCaller) -> None:
    case.call_and_validate(app=target, additional_checks=CUSTOM_CHECKS)


# ---------------------------------------------------------------- targeted cases

#: Tables a refused request may write to: the ledger records refusals (DEVELOPERS.md).
LEDGER_TABLES = {"ledger_entry", "ledger_node", "ledger_head", "ledger_ref", "ledger_checkpoint"}


def _state(node: Node) -> dict[str, list[tuple[Any, ...]]]:
    return {k: v for k, v in snapshot(node.ctx).items() if k not in LEDGER_TABLES}


def assert_error_object(r: httpx.Response, status: int) -> dict[str, Any]:
    assert r.status_code == status, (r.status_code, r.text)
    body = r.json()
    assert isinstance(body, dict) and set(body) <= {"message", "details"}, body
    assert isinstance(body["message"], str) and body["message"], body
    assert all(isinstance(d, dict) for d in body.get("details", [])), body
    return body


def _block(**change: Any) -> dict[str, Any]:
    block = {
        "block_id": "3f0c1e0a-8d5e-4c4f-9a41-5b2d0c1e7a10",
        "key": base64.b64encode(bytes(64)).decode(),
        "qber": 0.02,
        "epsilon": 1e-10,
        "produced_at": "2026-12-01T00:00:00Z",
    }
    return {"blocks": [block | change]}


_POLICY = {"pair_id": "pair-bc", "relay_id": "relay-1", "stations": ["station-b", "station-c"]}
KEY_ID = "3f0c1e0a-8d5e-4c4f-9a41-5b2d0c1e7a10"

#: (certificate, path, JSON body) that break a strict type: ``true`` or a string where a
#: number is required, a number where a string is required, a float for an integer.
#: JSON has no integer type of its own; "no coercion" is pydantic's strict mode, which
#: the domain models declare (delivery/schemas.py, registry/specs.py). Common practice.
WRONG_TYPES: list[tuple[str, str, dict[str, Any]]] = [
    ("sae-a1", "/api/v1/keys/sae-c1/enc_keys", {"number": True}),
    ("sae-a1", "/api/v1/keys/sae-c1/enc_keys", {"number": "1"}),
    ("sae-a1", "/api/v1/keys/sae-c1/enc_keys", {"number": 1.0}),
    ("sae-a1", "/api/v1/keys/sae-c1/enc_keys", {"size": False}),
    ("sae-a1", "/api/v1/keys/sae-c1/enc_keys", {"size": "256"}),
    ("sae-a1", "/api/v1/keys/sae-c1/enc_keys", {"size": 256.0}),
    ("sae-a1", "/api/v1/keys/sae-c1/enc_keys", {"additional_slave_SAE_IDs": [1]}),
    ("sae-a1", "/api/v1/keys/sae-c1/enc_keys", {"additional_slave_SAE_IDs": "sae-c1"}),
    ("sae-a1", "/api/v1/keys/sae-c1/dec_keys", {"key_IDs": [{"key_ID": 1}]}),
    ("sae-a1", "/api/v1/keys/sae-c1/dec_keys", {"key_IDs": [{"key_ID": True}]}),
    ("sae-a1", "/api/v1/keys/sae-c1/dec_keys", {"key_IDs": [KEY_ID]}),
    ("sae-a1", "/api/v1/keys/sae-c1/dec_keys", {"key_IDs": KEY_ID}),
    ("ops-ada", "/api/v1/registry/pairs", _POLICY | {"policy": {"priority": True}}),
    ("ops-ada", "/api/v1/registry/pairs", _POLICY | {"policy": {"priority": "7"}}),
    ("ops-ada", "/api/v1/registry/pairs", _POLICY | {"policy": {"priority": 7.0}}),
    ("ops-ada", "/api/v1/registry/pairs", _POLICY | {"policy": {"key_ttl_seconds": "60"}}),
    ("ops-ada", "/api/v1/registry/pairs", _POLICY | {"policy": {"max_epsilon": True}}),
    ("ops-ada", "/api/v1/registry/pairs", _POLICY | {"policy": {"max_epsilon": "0.1"}}),
    ("ops-ada", "/api/v1/registry/pairs", _POLICY | {"stations": "station-b"}),
    ("ops-ada", "/api/v1/registry/nodes", {"node_id": 7, "role": "station"}),
    ("ops-ada", "/api/v1/registry/nodes", {"node_id": "station-d", "role": True}),
    (
        "ops-ada",
        "/api/v1/registry/principals",
        {"principal_id": "x", "role": "operator", "cert_subject": 1},
    ),
    ("mod-link-a", "/api/v1/links/link-a/blocks", _block(qber=True)),
    ("mod-link-a", "/api/v1/links/link-a/blocks", _block(qber="0.02")),
    ("mod-link-a", "/api/v1/links/link-a/blocks", _block(epsilon=False)),
    ("mod-link-a", "/api/v1/links/link-a/blocks", _block(produced_at=1_796_083_200)),
    ("mod-link-a", "/api/v1/links/link-a/blocks", _block(key=1234)),
    ("mod-link-a", "/api/v1/links/link-a/blocks", _block(block_id=1)),
]

#: The same requests with the types right: each gets past validation (a control, so
#: the refusals above are not refusals of everything).
RIGHT_TYPES: list[tuple[str, str, dict[str, Any], int]] = [
    ("sae-a1", "/api/v1/keys/sae-c1/enc_keys", {"number": 1, "size": 256}, 503),  # no key
    ("ops-ada", "/api/v1/registry/pairs", _POLICY | {"policy": {"priority": 7}}, 201),
    ("mod-link-a", "/api/v1/links/link-a/blocks", _block(), 200),
]


def test_strict_types_in_json_bodies(station: Node, api: Any) -> None:
    clients = {cert: api(station)(cert) for cert in ("sae-a1", "ops-ada", "mod-link-a")}
    before = _state(station)
    for cert, path, body in WRONG_TYPES:
        r = clients[cert].post(path, json=body)
        error = assert_error_object(r, 400)
        assert error.get("details"), (path, body, error)  # names the field
    assert _state(station) == before, "a refused request changed the node"
    for cert, path, body, status in RIGHT_TYPES:
        r = clients[cert].post(path, json=body)
        assert r.status_code == status, (path, r.text)


def test_patch_with_null_for_a_required_field_is_400(station: Node, api: Any) -> None:
    """Regression (found by the schemathesis run): ``null`` for a field that the
    registry stores NOT NULL reached the database and answered 500."""
    ops = api(station)("ops-ada")
    before = _state(station)
    for path, body in [
        ("/api/v1/registry/links/link-a", {"description": None}),
        ("/api/v1/registry/nodes/station-b", {"description": None}),
        ("/api/v1/registry/principals/sae-c1", {"cert_subject": None}),
        ("/api/v1/registry/principals/sae-c1", {"description": None}),
    ]:
        error = assert_error_object(ops.patch(path, json=body), 400)
        assert "cannot be null" in error["message"], error
    assert _state(station) == before
    # Where an entry may lack the field, null still clears it.
    r = ops.patch("/api/v1/registry/nodes/station-b", json={"url": None})
    assert r.status_code == 200 and r.json()["url"] is None, r.text


#: Strings PostgreSQL cannot store (NUL) or that are far longer than any column, in the
#: places a request puts them: path, query and JSON body.
NASTY = ["\x00", "a\x00b", "x" * 5000, "../../etc/passwd", "%00", "' OR 1=1 --", "\u202e"]


def test_nasty_strings_never_break_the_server(station: Node, api: Any) -> None:
    clients = {c: api(station)(c) for c in ("ops-ada", "aud-ben", "sae-a1", "peer-relay")}
    for s in NASTY:
        quoted = urllib.parse.quote(s, safe="")
        requests: list[tuple[str, str, str, Any]] = [
            ("ops-ada", "GET", f"/api/v1/registry/nodes/{quoted}", None),
            ("ops-ada", "PATCH", f"/api/v1/registry/links/{quoted}", {"description": "d"}),
            ("ops-ada", "DELETE", f"/api/v1/registry/principals/{quoted}", None),
            ("ops-ada", "POST", "/api/v1/registry/nodes", {"node_id": s, "role": "station"}),
            ("ops-ada", "GET", f"/api/v1/links/{quoted}/pool", None),
            ("aud-ben", "GET", f"/api/v1/audit/search?pair={quoted}&since={quoted}", None),
            ("sae-a1", "GET", f"/api/v1/keys/{quoted}/status", None),
            ("sae-a1", "POST", f"/api/v1/keys/{quoted}/enc_keys", {"number": 1}),
            ("sae-a1", "POST", "/api/v1/keys/sae-c1/enc_keys", {"additional_slave_SAE_IDs": [s]}),
            ("sae-a1", "GET", f"/api/v1/keys/sae-c1/dec_keys?key_ID={quoted}", None),
            ("peer-relay", "GET", f"/api/v1/peer/pairs/{quoted}/buffer", None),
            ("peer-relay", "POST", "/api/v1/peer/messages/batch", {"messages": [{"kind": s}]}),
            (
                "peer-relay",
                "POST",
                "/api/v1/peer/messages/batch",
                {
                    "messages": [
                        {"kind": "segment.check", "segment_id": s, "pair_id": s, "check": s}
                    ]
                },
            ),
        ]
        for cert, method, path, body in requests:
            r = clients[cert].request(method, path, json=body)
            assert r.status_code < 500, (method, path, r.status_code, r.text)
            if r.status_code >= 400:
                assert_error_object(r, r.status_code)
    # Bytes that are not UTF-8, and JSON escapes of a lone surrogate (valid JSON text,
    # not encodable as UTF-8 nor storable in PostgreSQL).
    raw: list[tuple[str, str, bytes]] = [
        ("ops-ada", "/api/v1/registry/nodes", b'{"node_id": "\xff\xfe", "role": "station"}'),
        ("ops-ada", "/api/v1/registry/nodes", b'{"node_id": "\\ud800", "role": "station"}'),
        ("sae-a1", "/api/v1/keys/sae-c1/enc_keys", b'{"additional_slave_SAE_IDs": ["\xff"]}'),
        ("sae-a1", "/api/v1/keys/sae-c1/enc_keys", b'{"additional_slave_SAE_IDs": ["\\ud800"]}'),
        ("peer-relay", "/api/v1/peer/messages/batch", b'{"messages": [{"kind": "\xff"}]}'),
        (
            "peer-relay",
            "/api/v1/peer/messages/batch",
            b'{"messages": [{"kind": "segment.check", "segment_id": '
            b'"\\ud800", "pair_id": "pair-ac", "check": "AAAA"}]}',
        ),
        ("sae-a1", "/api/v1/keys/%FF%FE/enc_keys", b"{}"),
    ]
    for cert, path, content in raw:
        r = clients[cert].post(path, content=content, headers={"content-type": "application/json"})
        assert r.status_code < 500, (path, content, r.status_code, r.text)
        assert_error_object(r, r.status_code)


# ---------------------------------------------------------------- peer messages

#: Message kinds a station takes (node/dispatch.py) and the fields their handlers read.
STATION_KINDS = [
    "relay.notice",
    "relay.ciphertext",
    "segment.check",
    "segment.confirmed",
    "segment.discarded",
    "key.allocated",
    "key.expired",
    "segment.settled",
    "no.such",
]
FIELDS = [
    "segment_id",
    "pair_id",
    "link_id",
    "ranges",
    "bytes",
    "owner",
    "epsilon",
    "made_at",
    "header",
    "ciphertext",
    "tag",
    "check",
    "keys",
    "key_ids",
    "reason",
    "outcome",
]
json_values = st.recursive(
    st.none()
    | st.booleans()
    | st.integers()
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(), inner, max_size=3),
    max_leaves=8,
)
messages = (
    st.fixed_dictionaries(
        {"kind": st.sampled_from(STATION_KINDS)},
        optional=dict.fromkeys(FIELDS, json_values),
    )
    | json_values
)


def test_peer_messages(station: Node, api: Any) -> None:
    """Each message of ``POST /api/v1/peer/messages/batch`` is read by hand and not
    described in the OpenAPI document, so schemathesis cannot shape it: hypothesis does,
    with the message kinds and field names the handlers read and values of any JSON
    type."""
    peer = api(station)("peer-relay")

    @hypothesis.settings(max_examples=60, derandomize=True, database=None, deadline=None)
    @hypothesis.given(body=messages)
    def answer_is_never_a_server_error(body: Any) -> None:
        # The whole batch refused (400), or one result per message attempted.
        r = peer.post("/api/v1/peer/messages/batch", json={"messages": [body, body]})
        assert r.status_code in (200, 400), (r.status_code, r.text)
        if r.status_code == 400:
            assert_error_object(r, 400)
        else:
            results = r.json()["results"]
            assert 1 <= len(results) <= 2
            assert all(x["status"] in (200, 400, 403, 404, 409) for x in results), results

    answer_is_never_a_server_error()


# ---------------------------------------------------------------- the document itself


def _once(app: Any, method: str, path: str) -> httpx.Response:
    with start_blocking_portal() as portal:
        client = AsgiClient(portal, app)
        try:
            return client.request(method, path)
        finally:
            client.close()


def test_document_is_the_apps_own(target: AsAdmittedCaller) -> None:
    """The run above uses the document built from the route table; the app serves the
    same one (apart from its title and version)."""
    served = _once(target, "GET", "/openapi.json").json()
    built = openapi_document()
    served.pop("info"), built.pop("info")
    assert served == built


def test_every_error_answer_is_documented_with_the_error_object() -> None:
    """Every operation names its error statuses with the error object, and the
    framework's 422 (never given: validation errors are 400) is gone."""
    doc = openapi_document()
    for path, operations in doc["paths"].items():
        for method, op in operations.items():
            responses = op["responses"]
            assert "422" not in responses, (method, path)
            assert {"401", "503"} <= set(responses), (method, path)
            for status, answer in responses.items():
                if status[0] in "45":
                    ref = answer["content"]["application/json"]["schema"]["$ref"]
                    assert ref.rsplit("/", 1)[1] == "ErrorBody", (path, status)


def test_allow_lists_every_method(target: AsAdmittedCaller) -> None:
    """RFC 9110 section 15.5.6: a 405 answer lists the target's supported methods."""
    r = _once(target, "PUT", "/api/v1/registry/nodes/station-b")
    assert r.status_code == 405
    assert set(r.headers["allow"].replace(" ", "").split(",")) == {"GET", "PATCH", "DELETE"}
    assert r.json()["message"] == "Method Not Allowed"
    # ETSI GS QKD 014 section 5.1: Get key is GET or POST on the same path.
    r = _once(target, "PUT", "/api/v1/keys/sae-b1/enc_keys")
    assert r.status_code == 405
    assert set(r.headers["allow"].replace(" ", "").split(",")) == {"GET", "POST"}
