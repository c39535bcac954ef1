"""Refusals in the ledger, from the attacker's side: what a refused caller puts into the
ledger (never the raw path, only the route template and a keyed hash of it; the subject
only when it is registered), how many ledger writes a flood of refusals costs (one per
subject, reason and route per interval, the rest counted), the reason an auditor reads
for each Get key with key IDs refusal, and that peer routes read no body before the
caller's role is known."""

from __future__ import annotations

import base64
import dataclasses
import hashlib
import hmac
import json
import uuid
from datetime import timedelta
from typing import Any

import pytest
from sqlalchemy import select

import relaynet
from conftest import Node
from helpers import SteppedClock
from keystrata.registry import principals
from keystrata.storage.models import LedgerEntry

#: A key a confused or hostile client puts into a path: 32 known bytes.
CANARY = hashlib.sha256(b"refusal canary").digest()
CANARY_TEXTS = (
    base64.urlsafe_b64encode(CANARY).decode().rstrip("="),
    CANARY.hex(),
)


@pytest.fixture
def clocked(station: Node) -> tuple[Node, SteppedClock]:
    clock = SteppedClock(station.ctx.clock.now())
    station.ctx = dataclasses.replace(station.ctx, clock=clock, process_state={})
    return station, clock


def entries(node: Node, event: str | None = None) -> list[dict[str, Any]]:
    with node.ctx.db.read() as s:
        rows = s.execute(select(LedgerEntry.entry).order_by(LedgerEntry.idx)).scalars()
        out = [json.loads(bytes(r)) for r in rows]
    return [e for e in out if event is None or e["event"] == event]


def path_hash(node: Node, path: str) -> str:
    """The documented keyed hash of a raw path (DEVELOPERS.md, "Ledger events"), computed
    with the standard library's HMAC-SHA-256 (RFC 2104), not through keystrata's code:
    HMAC(fingerprint key, len(label) || label || len(path) || path), lengths as 8-byte
    big-endian integers."""
    mac = hmac.new(node.ctx.fingerprint_key, digestmod=hashlib.sha256)
    for part in (principals.PATH_HASH_LABEL, path.encode()):
        mac.update(len(part).to_bytes(8, "big") + part)
    return mac.hexdigest()


def test_a_key_in_the_path_never_reaches_the_ledger(clocked, api) -> None:
    """A stranger, a principal of the wrong role and an SAE asking for a slave that does
    not exist put a key into path segments: the ledger names the route template and a
    keyed hash of the path, never the path (attack test: the whole path was recorded)."""
    station, _ = clocked
    text = CANARY_TEXTS[0]
    probes = [
        ("stranger", "GET", f"/api/v1/keys/{text}/status", "unknown_certificate"),
        ("mon-cal", "POST", f"/api/v1/keys/{text}/enc_keys", "role_not_admitted"),
        ("aud-ben", "GET", f"/api/v1/links/{text}/pool?x={CANARY_TEXTS[1]}", None),
        ("sae-a1", "GET", f"/api/v1/registry/nodes/{CANARY_TEXTS[1]}", "role_not_admitted"),
    ]
    before = len(entries(station))
    for cert, method, path, _ in probes:
        r = api(station)(cert).request(method, path, json={})
        assert r.status_code in (200, 401, 403, 404), r.text
    new = entries(station)[before:]
    raw = json.dumps(new)
    for canary in CANARY_TEXTS:
        assert canary not in raw and canary.upper() not in raw, raw
    refused = [e for e in new if e["event"] == "auth.refused"]
    assert [e["reason"] for e in refused] == [p[3] for p in probes if p[3]]
    assert [e["route"] for e in refused] == [
        "/api/v1/keys/{slave_SAE_ID}/status",
        "/api/v1/keys/{slave_SAE_ID}/enc_keys",
        "/api/v1/registry/nodes/{entry_id}",
    ]
    assert refused[0]["path_hash"] == path_hash(station, probes[0][2])
    assert refused[1]["path_hash"] == path_hash(station, probes[1][2])
    # The subject is recorded only when it names a registered principal; a stranger's
    # subject is a keyed hash (the certificate is the attacker's choice in proxy mode).
    assert refused[0]["subject"] is None and len(refused[0]["subject_hash"]) == 64
    assert refused[1]["subject"] == "mon-cal" and refused[1]["principal"] == "mon-cal"
    assert "path" not in refused[0]


def test_a_flood_of_refusals_costs_one_ledger_write_per_interval(clocked, api) -> None:
    """A stranger with a certificate of the network's CA sends 40 requests: one entry is
    written at once, the other 39 are counted and written with the next entry of the
    same subject, reason and route (attack test: 40 fsync'd ledger writes)."""
    station, clock = clocked
    stranger = api(station)("stranger")
    before = len(entries(station, "auth.refused"))
    for i in range(40):
        assert stranger.get(f"/api/v1/registry/nodes/n{i}").status_code == 401
    written = entries(station, "auth.refused")[before:]
    assert len(written) == 1 and written[0]["count"] == 1
    # Another route is another key: written at once.
    assert stranger.get("/api/v1/node").status_code == 401
    assert len(entries(station, "auth.refused")) == before + 2
    # After the interval the next refusal carries the 39 counted ones.
    clock.advance(station.ctx.settings.ledger.refusal_interval_seconds + 1)
    assert stranger.get("/api/v1/registry/nodes/n99").status_code == 401
    written = entries(station, "auth.refused")[before:]
    assert len(written) == 3
    assert written[2]["count"] == 40 and written[2]["route"] == "/api/v1/registry/nodes/{entry_id}"
    assert written[2]["since"] == written[0]["at"] or written[2]["since"] > written[0]["at"]
    assert sum(e["count"] for e in written) == 42  # nothing lost


def test_counted_refusals_are_flushed_when_no_other_comes(clocked, api) -> None:
    station, clock = clocked
    stranger = api(station)("stranger")
    before = len(entries(station, "auth.refused"))
    for _ in range(5):
        assert stranger.get("/api/v1/node").status_code == 401
    assert principals.flush_refusals(station.ctx) == 0  # the interval is still open
    clock.advance(station.ctx.settings.ledger.refusal_interval_seconds + 1)
    assert principals.flush_refusals(station.ctx) == 1
    assert principals.flush_refusals(station.ctx) == 0
    written = entries(station, "auth.refused")[before:]
    assert [e["count"] for e in written] == [1, 4]
    assert written[1]["route"] == "/api/v1/node"


def test_a_retired_principal_is_refused_like_an_unknown_one_and_counted(clocked, api) -> None:
    """The certificate of a retired principal still completes TLS: its requests are 401
    and aggregated like a stranger's (attack test: one ledger write per request)."""
    station, _ = clocked
    assert api(station)("ops-ada").delete("/api/v1/registry/principals/aud-ben").status_code == 200
    retired = api(station)("aud-ben")
    before = len(entries(station, "auth.refused"))
    for _ in range(20):
        r = retired.get("/api/v1/audit/checkpoints/latest")
        assert r.status_code == 401 and r.json() == {"message": "unauthorized"}
    written = entries(station, "auth.refused")[before:]
    assert len(written) == 1
    assert written[0]["reason"] == "retired_principal"
    assert written[0]["subject"] == "aud-ben" and written[0]["principal"] == "aud-ben"


def test_refusal_windows_are_bounded_in_memory(clocked) -> None:
    """However many distinct subjects arrive, the process keeps at most ``max_windows``
    of them; the rest share one overflow window per reason and route, and are still
    counted (here with 8 windows instead of MAX_WINDOWS, to stay fast)."""
    station, _ = clocked
    digest = principals.RefusalDigest(max_windows=8)
    station.ctx.process_state["auth.refused"] = digest
    before = len(entries(station, "auth.refused"))
    for i in range(58):
        principals.record_refusal(
            station.ctx,
            reason="unknown_certificate",
            subject=f"s{i}",
            principal_id=None,
            method="GET",
            route="/api/v1/node",
            path="/api/v1/node",
        )
        assert len(digest.windows) <= 9
    assert len(entries(station, "auth.refused")) - before == 9  # 8 windows and the overflow
    principals.flush_refusals(station.ctx, everything=True)
    written = entries(station, "auth.refused")[before:]
    assert sum(e["count"] for e in written) == 58, written


# ---------------------------------------------------------------- peer routes


@pytest.mark.parametrize(("cert", "status"), [("sae-a1", 403), ("stranger", 401)])
def test_peer_message_route_reads_no_body_before_the_role_check(
    station: Node, api, cert: str, status: int
) -> None:
    """A non-peer sends a large body that is not JSON: it is refused for its role (not
    400 for its body), and the app never took a byte of the body from the connection
    (attack test: FastAPI parsed up to the 16 MiB limit before the role check)."""
    client = api(station)(cert)
    taken: list[int] = []
    wrapper = client._client._transport.app  # conftest._WithClientCert
    inner = wrapper.app

    async def counting(scope: Any, receive: Any, send: Any) -> None:
        async def counted() -> Any:
            message = await receive()
            if message["type"] == "http.request":
                taken.append(len(message.get("body", b"")))
            return message

        await inner(scope, counted, send)

    wrapper.app = counting
    body = b"{" * (4 * 1024 * 1024)
    r = client.post(
        "/api/v1/peer/messages/batch", content=body, headers={"content-type": "application/json"}
    )
    assert r.status_code == status, r.text
    assert sum(taken) == 0, f"{sum(taken)} body bytes read before the role check"


# ---------------------------------------------------------------- key.refused reasons


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    net = relaynet.build(make_node, db_factory)
    relaynet.provision_saes(net)
    relaynet.ready_key(net, segments=2, size=1024)
    return net


def _key_ids(r: Any) -> list[str]:
    assert r.status_code == 200, r.text
    return [k["key_ID"] for k in r.json()["keys"]]


def _last_reason(node: Node) -> str:
    return str(entries(node, "key.refused")[-1]["reason"])


def test_get_key_with_key_ids_refusals_name_their_reason(net, api) -> None:
    """Every refusal answers the standard's one 401; the ledger tells an auditor a
    replay (already delivered) from a mistake (not allocated to this SAE), an expired
    key and an unknown key ID (attack test: one reason for all of them)."""
    from keystrata.delivery import dec_keys
    from keystrata.errors import Unauthenticated
    from keystrata.registry.principals import Caller

    class NothingPending:
        def pending_allocations(self, owner: str) -> list[dict[str, Any]]:
            return []

    a1 = api(net.a)("sae-a1")
    first, second = _key_ids(a1.post("/api/v1/keys/sae-b1/enc_keys", json={"number": 2}))
    net.drain()
    b1, b2 = api(net.b)("sae-b1"), api(net.b)("sae-b2")

    def dec(client: Any, master: str, key_id: str) -> int:
        r = client.get(f"/api/v1/keys/{master}/dec_keys?key_ID={key_id}")
        if r.status_code == 401:
            assert r.json() == {"message": "unauthorized"}
        return r.status_code

    assert dec(b2, "sae-a1", first) == 401
    assert _last_reason(net.b) == "not_allocated_to_this_sae"
    assert dec(b1, "sae-a2", first) == 401  # wrong master
    assert _last_reason(net.b) == "not_allocated_to_this_sae"
    assert dec(b1, "sae-a1", first) == 200
    assert dec(b1, "sae-a1", first) == 401
    assert _last_reason(net.b) == "already_delivered"
    # An unknown key ID, with the owner saying it has nothing pending for us.
    caller = Caller(
        principal_id="sae-b1", role=principals.PrincipalRole.SAE, station_id="station-b"
    )
    with pytest.raises(Unauthenticated):
        dec_keys.get_keys_with_ids(
            net.b.ctx, caller, "sae-a1", [str(uuid.uuid4())], NothingPending()
        )
    assert _last_reason(net.b) == "unknown_key_id"
    # The first key that fails decides: here the second one, expired.
    later = dataclasses.replace(
        net.b.ctx,
        clock=SteppedClock(net.b.ctx.clock.now() + timedelta(days=400)),
        process_state={},
    )
    with pytest.raises(Unauthenticated):
        dec_keys.get_keys_with_ids(later, caller, "sae-a1", [second], None)
    assert _last_reason(net.b) == "expired"
    assert dec(b1, "sae-a1", second) == 200  # nothing was changed by the refusals
