"""Canary: key deliveries with key bytes we chose, then a scan of every place key material
must never reach (invariant 6 of the design notes): logs at DEBUG for every logger, every
ledger entry, every error body, the Prometheus metrics, the outbox rows, the text and
repr of every exception raised, and (invariant 7) every row of every table at rest.

The link blocks are a known pattern (SHA-256 in counter mode over a label, so every window
is distinctive); the pair key of each segment and every delivered key are read back and
added to the secrets. The scanner looks for any run of 24 bytes or more of a secret, raw,
in hex (either case), in Base64 (standard and URL-safe, RFC 4648 sections 4 and 5, at
every alignment) and inside Python ``bytes`` literals (a repr in a log line); the first
test plants secrets in each form and checks that it finds them.
"""

from __future__ import annotations

import base64
import hashlib
import json
import logging
import traceback
import uuid
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import httpx
import pytest
from anyio.from_thread import start_blocking_portal
from sqlalchemy import select

import relaynet
from canaries import LINK_KEY, Scanner, pattern, probe
from conftest import AsgiClient, Node, NodeFactory, _WithClientCert
from helpers import snapshot
from keystrata.errors import KeystrataError
from keystrata.links import ingest
from keystrata.links.blocks import BlockIn
from keystrata.loopback.pki import PkiFiles, cert_pin
from keystrata.node import dispatch
from keystrata.peering import outbox
from keystrata.registry import provisioning
from keystrata.registry.specs import Kind, PrincipalSpec
from keystrata.relay import operation
from keystrata.relay.planning import choose_owner
from keystrata.server import compose
from keystrata.storage.models import LedgerEntry, OutboxMessage, PairSegment
from keystrata.storage.sealed import segment_context

#: The peer message route (one sender's messages in order; the outbox sends this way).
PEER_BATCH = "/api/v1/peer/messages/batch"


def test_the_scanner_finds_planted_secrets_and_nothing_else() -> None:
    """The scan can fail: each encoding of a secret, planted in a string or in bytes, at
    any offset, is found; text without secrets is clean."""
    scanner = Scanner()
    key = pattern("planted-key", 32)
    block = pattern("planted-block", 1024)
    scanner.add(key)
    scanner.add(block)
    piece = block[101:131]  # 30 bytes at an odd offset inside the block
    planted: dict[str, bytes | str] = {
        "raw in bytes": b"prefix\x00" + key + b"suffix",
        "raw slice in bytes": b"xx" + piece + b"yy",
        "Base64 in text": f"delivered {base64.b64encode(key).decode()} ok",
        "URL-safe Base64": f"k={base64.urlsafe_b64encode(piece).decode()}",
        "hex upper": f"KEY={piece.hex().upper()}",
        "hex lower in JSON": json.dumps({"k": key.hex()}),
        "repr in a log line": f"value was {block[500:540]!r}",
        "Base64 in bytes": b"{" + base64.b64encode(block[7:40]) + b"}",
    }
    for name, haystack in planted.items():
        assert scanner.find(haystack), f"scanner missed the secret planted as {name}"
    clean: list[bytes | str] = [
        f"key_ID {uuid.uuid4()} delivered to sae-b1",
        hashlib.sha256(key).hexdigest(),  # a digest of a key is not the key
        base64.b64encode(pattern("another", 64)).decode(),
        b"\x00" * 4096,
    ]
    for haystack in clean:
        assert not scanner.find(haystack), haystack


# ---------------------------------------------------------------- the network under test


@dataclass
class Harness:
    net: relaynet.RelayNet
    scanner: Scanner
    client: Callable[[str, str], AsgiClient]
    errors: list[tuple[str, bytes]] = field(default_factory=list)  # (request, error body)
    raised: list[BaseException] = field(default_factory=list)
    outbox_rows: list[tuple[str, tuple[Any, ...]]] = field(default_factory=list)
    ciphertexts: int = 0

    def call(self, node: str, cert: str, method: str, path: str, **kw: Any) -> httpx.Response:
        r = self.client(node, cert).request(method, path, **kw)
        if r.status_code >= 400:
            self.errors.append((f"{method} {path} at {node} as {cert}", r.content))
        elif path == PEER_BATCH:  # a refused message answers 200, its refusal inside
            for result in r.json()["results"]:
                if result["status"] >= 400:
                    refusal = json.dumps(result).encode()
                    self.errors.append((f"{method} {path} at {node} as {cert}", refusal))
        return r

    def capture_outbox(self) -> None:
        for name, node in self.net.nodes.items():
            with node.ctx.db.read() as s:
                for row in s.execute(select(OutboxMessage)).scalars():
                    cells = tuple(getattr(row, c.name) for c in OutboxMessage.__table__.columns)
                    self.outbox_rows.append((name, cells))
                    if row.kind == "relay.ciphertext":
                        self.ciphertexts += 1

    def drain(self) -> None:
        """relaynet's drain, keeping every outbox row and every exception raised."""
        for _ in range(50):
            self.capture_outbox()
            progress = False
            for sender, message in self.net.pending():
                target = self.net.nodes[message.destination]
                try:
                    outcome = dispatch.handle(target.ctx, sender, dict(message.body)).outcome
                except KeystrataError as exc:
                    self.raised.append(exc)
                    continue
                outbox.delivered(self.net.nodes[sender].ctx.db, [message.id])
                progress = progress or outcome in ("applied", "already", "discarded")
            if not progress:
                return


def _recording(handler: Any, sink: list[BaseException]) -> Any:
    async def record(request: Any, exc: BaseException) -> Any:
        sink.append(exc)
        return await handler(request, exc)

    return record


@pytest.fixture
def harness(make_node: NodeFactory, db_factory: Any, pki: PkiFiles) -> Iterator[Harness]:
    net = relaynet.build(make_node, db_factory)
    relaynet.provision_saes(net)
    for pid, role, extra in (
        ("ops-ada", "operator", {"cert_sha256": cert_pin(pki.dir, "ops-ada")}),
        ("mod-link-a", "qkd-module", {"link_id": "link-a"}),
    ):
        provisioning.create(
            net.relay.ctx,
            Kind.PRINCIPALS,
            PrincipalSpec.model_validate(
                {"principal_id": pid, "role": role, "cert_subject": pid} | extra
            ),
            actor="test",
        )
    raised: list[BaseException] = []
    with start_blocking_portal() as portal:
        apps = {}
        for name, node in net.nodes.items():
            app = compose(node.ctx)
            for key, handler in list(app.exception_handlers.items()):
                app.exception_handlers[key] = _recording(handler, raised)
            apps[name] = app
        clients: dict[tuple[str, str], AsgiClient] = {}

        def client(node: str, cert: str) -> AsgiClient:
            if (node, cert) not in clients:
                clients[node, cert] = AsgiClient(portal, _WithClientCert(apps[node], pki.pem(cert)))
            return clients[node, cert]

        h = Harness(net=net, scanner=Scanner(), client=client, raised=raised)
        yield h
        for c in clients.values():
            c.close()


def feed_known(h: Harness, station: str, blocks: int, size: int = 1024) -> None:
    """Identical blocks of known bytes into both ends of the station's link."""
    link = h.net.links[station]
    now = datetime.now(UTC)
    made = []
    for i in range(blocks):
        key = pattern(f"canary:{link}:{i}", size)
        h.scanner.add(key)
        block_id = str(uuid.UUID(bytes=hashlib.sha256(f"{link}:{i}".encode()).digest()[:16]))
        made.append(BlockIn(block_id, key, 0.02, 1e-10, now))
    for node in (h.net.relay, h.net.nodes[station]):
        ingest.ingest(node.ctx, link, made, actor="test-module", actor_link=link)


def pair_keys(node: Node) -> dict[str, bytes]:
    """The remaining pair key of every ready segment at a station (opened from its seal)."""
    out = {}
    with node.ctx.db.read() as s:
        for row in s.execute(select(PairSegment)).scalars():
            if row.state == "ready" and row.sealed is not None:
                out[row.segment_id] = node.ctx.keyring.open(
                    row.sealed, segment_context(row, row.used)
                )
    return out


def _keys(r: httpx.Response) -> dict[str, bytes]:
    assert r.status_code == 200, r.text
    # RFC 4648 section 4 Base64, strictly decoded.
    return {k["key_ID"]: base64.b64decode(k["key"], validate=True) for k in r.json()["keys"]}


def _ids(keys: dict[str, bytes]) -> dict[str, Any]:
    return {"key_IDs": [{"key_ID": k} for k in keys]}


def run_deliveries(h: Harness) -> None:
    """Relay with a tampered ciphertext first, then deliveries both ways (POST and GET,
    several sizes, an additional slave) and refusals of every kind along the way."""
    net = h.net
    feed_known(h, "station-a", 8)
    feed_known(h, "station-b", 8)
    owned = {"station-a": 0, "station-b": 0}
    for _ in range(5):
        owner = choose_owner("station-a", "station-b", 0, 0, owned["station-a"], owned["station-b"])
        operation.make_segment(net.relay.ctx, relaynet.PAIR, 1024, owner=owner)
        owned[owner] += 1024
    h.capture_outbox()
    # A tampered relay ciphertext, through the peer route: one bit of C flipped.
    _, message = next((s, m) for s, m in net.pending() if m.kind == "relay.ciphertext")
    tampered = dict(message.body)
    c = bytearray(base64.b64decode(tampered["ciphertext"]))
    c[0] ^= 1
    tampered["ciphertext"] = base64.b64encode(bytes(c)).decode()
    r = h.call(message.destination, "relay-1", "POST", PEER_BATCH, json={"messages": [tampered]})
    assert r.status_code < 500, r.text
    h.drain()
    for name in ("station-a", "station-b"):
        for key in pair_keys(net.nodes[name]).values():
            h.scanner.add(key)
    assert pair_keys(net.a).keys() == pair_keys(net.b).keys()
    assert pair_keys(net.a)  # some segments are ready despite the tampered one

    a1 = ("station-a", "sae-a1")
    # Get key (POST and GET) at A; Get key with key IDs at B.
    master = _keys(h.call(*a1, "POST", "/api/v1/keys/sae-b1/enc_keys", json={"number": 3}))
    master |= _keys(h.call(*a1, "GET", "/api/v1/keys/sae-b1/enc_keys?number=2&size=512"))
    h.drain()
    first, *rest = list(master)
    slave = _keys(
        h.call("station-b", "sae-b1", "GET", f"/api/v1/keys/sae-a1/dec_keys?key_ID={first}")
    )
    slave |= _keys(
        h.call(
            "station-b",
            "sae-b1",
            "POST",
            "/api/v1/keys/sae-a1/dec_keys",
            json=_ids({k: master[k] for k in rest}),
        )
    )
    assert slave == master
    # The other direction, with an additional slave.
    body = {"number": 2, "size": 1024, "additional_slave_SAE_IDs": ["sae-a2"]}
    b_master = _keys(
        h.call("station-b", "sae-b1", "POST", "/api/v1/keys/sae-a1/enc_keys", json=body)
    )
    h.drain()
    for sae in ("sae-a1", "sae-a2"):
        got = h.call("station-a", sae, "POST", "/api/v1/keys/sae-b1/dec_keys", json=_ids(b_master))
        assert _keys(got) == b_master
    for key in [*master.values(), *b_master.values()]:
        h.scanner.add(key)

    # Refusals and bad requests.
    refusals: list[tuple[str, str, str, str, dict[str, Any]]] = [
        ("station-a", "sae-a1", "POST", "/api/v1/keys/sae-b1/enc_keys", {"json": {"size": 7}}),
        (
            "station-a",
            "sae-a1",
            "POST",
            "/api/v1/keys/sae-b1/enc_keys",
            {"json": {"number": 10**6}},
        ),
        (
            "station-a",
            "sae-a1",
            "POST",
            "/api/v1/keys/sae-b1/enc_keys",
            {"json": {"extension_mandatory": [{"x-canary": 1}]}},
        ),
        ("station-a", "sae-a1", "POST", "/api/v1/keys/sae-b1/enc_keys", {"json": {"number": True}}),
        ("station-a", "ops-ada", "POST", "/api/v1/keys/sae-b1/enc_keys", {"json": {}}),
        ("station-a", "sae-a1", "GET", "/api/v1/keys/sae-zz/status", {}),
        ("station-b", "sae-b2", "POST", "/api/v1/keys/sae-a1/dec_keys", {"json": _ids(master)}),
        ("station-b", "sae-b1", "POST", "/api/v1/keys/sae-a1/dec_keys", {"json": _ids(master)}),
        ("station-b", "sae-b1", "POST", "/api/v1/keys/sae-a2/dec_keys", {"json": _ids(master)}),
        (
            "station-a",
            "sae-a1",
            "POST",
            "/api/v1/keys/sae-b1/enc_keys",
            {"json": {"number": 500, "size": 4096}},
        ),
        (
            "relay-1",
            "mod-link-a",
            "POST",
            "/api/v1/links/link-a/blocks",
            {
                "json": {
                    "blocks": [
                        {
                            "block_id": str(
                                uuid.UUID(bytes=hashlib.sha256(b"link-a:0").digest()[:16])
                            ),
                            "key": base64.b64encode(pattern("other bytes", 1024)).decode(),
                            "qber": 0.02,
                            "epsilon": 1e-10,
                            "produced_at": "2026-12-01T00:00:00Z",
                        }
                    ]
                }
            },
        ),
        (
            "relay-1",
            "mod-link-a",
            "POST",
            "/api/v1/links/link-a/blocks",
            {
                "content": b"\x01" + pattern("garbage", 300),
                "headers": {"content-type": "application/octet-stream"},
            },
        ),
        ("station-b", "relay-1", "POST", PEER_BATCH, {"json": {"messages": [tampered]}}),
    ]
    for node, cert, method, path, kw in refusals:
        r = h.call(node, cert, method, path, **kw)
        status = r.json()["results"][-1]["status"] if path == PEER_BATCH else r.status_code
        assert 400 <= status < 600 and status != 500, (path, status, r.text)
    h.drain()


def _ledger(node: Node) -> list[bytes]:
    with node.ctx.db.read() as s:
        return [bytes(e) for e in s.execute(select(LedgerEntry.entry)).scalars()]


def _cells(rows: dict[str, list[tuple[Any, ...]]]) -> Iterator[tuple[str, bytes | str]]:
    for table, values in rows.items():
        for row in values:
            for cell in row:
                if isinstance(cell, (bytes, bytearray, memoryview)):
                    yield table, bytes(cell)
                elif cell is not None:
                    yield table, str(cell)


def test_no_key_material_outside_its_sealed_columns(
    harness: Harness, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.DEBUG)  # the root logger: every logger, SQLAlchemy's too
    for name in ("keystrata", "uvicorn", "uvicorn.error", "uvicorn.access", "sqlalchemy.engine"):
        caplog.set_level(logging.DEBUG, logger=name)
    h = harness
    run_deliveries(h)
    scanner = h.scanner
    assert scanner.count >= 16 + 10 + 5  # link blocks, pair keys, delivered keys
    assert h.ciphertexts, "no relay ciphertext passed through an outbox"
    assert len(h.errors) >= 12

    leaks: list[str] = []

    def check(place: str, haystack: bytes | str) -> None:
        found = scanner.find(haystack)
        if found:
            leaks.append(f"{place}: {', '.join(found)}")

    metrics = [h.call(name, "ops-ada", "GET", "/api/v1/metrics") for name in h.net.nodes]
    for name, r in zip(h.net.nodes, metrics, strict=True):
        assert r.status_code == 200 and b"# TYPE" in r.content, r.text
        check(f"metrics of {name}", r.content)
    for request, body in h.errors:
        check(f"error body of {request}", body)
    for name, node in h.net.nodes.items():
        for entry in _ledger(node):
            check(f"ledger entry at {name}", entry)
    # The outbox carries C = KA xor KB to the cipher station by design; never KA or KB.
    for name, cells in h.outbox_rows:
        for cell in cells:
            if cell is not None:
                check(f"outbox row at {name}", cell if isinstance(cell, bytes) else str(cell))
    for exc in h.raised:
        check(f"exception {type(exc).__name__}", str(exc) + repr(exc))
        check(f"traceback of {type(exc).__name__}", "".join(traceback.format_exception(exc)))
    assert h.raised, "no exception was raised: the refusals did not run"
    assert caplog.records, "nothing was logged"
    check("captured logs", caplog.text)
    for record in caplog.records:
        check(f"log record {record.name}", repr(record.args) + record.getMessage())
    # At rest (invariant 7): every row of every table, sealed columns included.
    for name, node in h.net.nodes.items():
        for table, cell in _cells(snapshot(node.ctx)):
            check(f"table {table} at {name}", cell)
    assert not leaks, "key material found:\n" + "\n".join(sorted(set(leaks)))


def test_key_material_a_client_sends_is_not_echoed(harness: Harness) -> None:
    """A confused or hostile client puts a key where an identifier belongs: the refusal
    (error body, ledger entry) does not repeat it."""
    h = harness
    key = pattern("client-held key", 32)
    h.scanner.add(key)
    text = base64.b64encode(key).decode()
    urlsafe = base64.urlsafe_b64encode(key).decode()
    before = {name: len(_ledger(node)) for name, node in h.net.nodes.items()}
    probes: list[tuple[str, str, str, dict[str, Any]]] = [
        ("sae-a1", "GET", f"/api/v1/keys/{urlsafe}/status", {}),
        ("sae-a1", "POST", f"/api/v1/keys/{urlsafe}/enc_keys", {"json": {}}),
        (
            "sae-a1",
            "POST",
            "/api/v1/keys/sae-b1/enc_keys",
            {"json": {"additional_slave_SAE_IDs": [text]}},
        ),
        (
            "sae-a1",
            "POST",
            "/api/v1/keys/sae-b1/enc_keys",
            {"json": {"extension_mandatory": [{text: True}]}},
        ),
        (
            "sae-a1",
            "POST",
            "/api/v1/keys/sae-b1/dec_keys",
            {"json": {"key_IDs": [{"key_ID": text}]}},
        ),
        ("sae-a1", "GET", f"/api/v1/keys/{urlsafe}/dec_keys?key_ID={uuid.uuid4()}", {}),
    ]
    for cert, method, path, kw in probes:
        r = h.call("station-a", cert, method, path, **kw)
        assert 400 <= r.status_code < 500, r.text
    found = [f"{req}: {h.scanner.find(body)}" for req, body in h.errors if h.scanner.find(body)]
    ledger = [
        f"ledger at {name}"
        for name, node in h.net.nodes.items()
        for entry in _ledger(node)[before[name] :]
        if h.scanner.find(entry)
    ]
    assert not found + ledger, "\n".join(found + ledger)


# ---------------------------------------------------------------- refusal paths


#: (certificate, method, path template) refused for each reason: a subject no principal
#: has, a role the route does not admit (403, and the ETSI routes' 401), a retired
#: principal, an SAE of another station, and an SAE asking for a slave that does not exist.
REFUSED: list[tuple[str, str, str, str]] = [
    ("unknown subject", "stranger", "GET", "/api/v1/registry/nodes/{}"),
    ("unknown subject", "stranger", "GET", "/api/v1/keys/{}/status"),
    ("wrong role", "mon-cal", "GET", "/api/v1/registry/links/{}"),
    ("wrong role", "mon-cal", "GET", "/api/v1/keys/{}/enc_keys"),
    ("wrong role", "sae-a1", "GET", "/api/v1/links/{}/pool"),
    ("retired principal", "aud-ben", "GET", "/api/v1/links/{}/pool"),
    ("SAE of another station", "sae-b2", "GET", "/api/v1/keys/{}/status"),
    ("SAE of another station", "sae-b2", "POST", "/api/v1/keys/{}/dec_keys"),
    ("unknown slave", "sae-a1", "GET", "/api/v1/keys/{}/status"),
    ("unknown slave", "sae-a1", "GET", "/api/v1/keys/{}/enc_keys"),
]


def test_refusals_of_every_kind_do_not_repeat_a_key_in_the_request(
    station: Node, api: Any, caplog: pytest.LogCaptureFixture
) -> None:
    """Refused requests carrying a link key in path, query and headers: the key is in no
    ledger entry, error body, log record (DEBUG, every logger) or metric."""
    caplog.set_level(logging.DEBUG)
    for name in ("keystrata", "sqlalchemy.engine"):
        caplog.set_level(logging.DEBUG, logger=name)
    ctx = station.ctx
    # The canary is a real link key of this node (sealed at rest, as it must be).
    block = BlockIn(str(uuid.uuid4()), LINK_KEY, 0.02, 1e-10, datetime.now(UTC))
    ingest.ingest(ctx, "link-a", [block], actor="test-module", actor_link="link-a")
    provisioning.create(
        ctx,
        Kind.PRINCIPALS,
        PrincipalSpec.model_validate(
            {"principal_id": "sae-c2", "role": "sae", "cert_subject": "sae-b2"}
            | {"station_id": "station-c"}
        ),
        actor="test",
    )
    assert api(station)("ops-ada").delete("/api/v1/registry/principals/aud-ben").status_code == 200
    scanner = Scanner()
    scanner.add(LINK_KEY)
    before = len(_ledger(station))
    bodies: list[tuple[str, bytes]] = []
    for why, cert, method, template in REFUSED:
        path, headers = probe(LINK_KEY, template)
        body = {"key_IDs": [{"key_ID": str(uuid.uuid4())}]} if method == "POST" else None
        r = api(station)(cert).request(method, path, headers=headers, json=body)
        assert r.status_code in (401, 403), (why, cert, path, r.status_code, r.text)
        bodies.append((f"{why}: {cert} {method} {template}", r.content))
    new = _ledger(station)[before:]
    events = [json.loads(e)["event"] for e in new]
    assert events.count("auth.refused") >= 5 and events.count("key.refused") >= 3, events
    metrics = api(station)("ops-ada").get("/api/v1/metrics")
    assert metrics.status_code == 200
    leaks = [f"error body of {req}" for req, body in bodies if scanner.find(body)]
    leaks += [f"ledger entry {json.loads(e)['event']}" for e in new if scanner.find(e)]
    leaks += ["metrics"] if scanner.find(metrics.content) else []
    assert caplog.records, "nothing was logged"
    # The test's own HTTP client (httpx, httpcore) logs the URL it sent: the caller's
    # side, not the node's.
    node_records = [r for r in caplog.records if not r.name.startswith(("httpx", "httpcore"))]
    assert node_records, "the node logged nothing"
    leaks += [f"log {r.name}" for r in node_records if scanner.find(r.getMessage())]
    assert not leaks, "key material found:\n" + "\n".join(leaks)
