"""Key delivery (ETSI GS QKD 014) through the API, in one process with real databases:
the master at station A and the slave at station B get the same key for every key ID;
keys are one-time; only the named slave may fetch; allocation never shares a byte."""

from __future__ import annotations

import hashlib
import itertools
import threading
from typing import Any

import pytest

import relaynet
from helpers import break_ledger, decoded_keys, ledger_events, snapshot
from keystrata.peering import outbox


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    return relaynet.with_ready_key(make_node, db_factory)


def test_master_and_slave_get_identical_keys_once(net, api) -> None:
    a1 = api(net.a)("sae-a1")
    r = a1.post("/api/v1/keys/sae-b1/enc_keys", json={"number": 3, "size": 256})
    assert r.status_code == 200, r.text
    master = decoded_keys(r.json())
    assert len(master) == 3 and all(len(k) == 32 for k in master.values())
    net.drain()  # the allocation message reaches station B
    b1 = api(net.b)("sae-b1")
    ids = [{"key_ID": k} for k in master]
    r = b1.post("/api/v1/keys/sae-a1/dec_keys", json={"key_IDs": ids})
    assert r.status_code == 200, r.text
    assert decoded_keys(r.json()) == master
    # One-time: the same IDs again fail, the same way as any refusal.
    r = b1.post("/api/v1/keys/sae-a1/dec_keys", json={"key_IDs": ids[:1]})
    assert r.status_code == 401 and r.json() == {"message": "unauthorized"}
    assert "key.delivered" in ledger_events(net.b.ctx)
    assert ledger_events(net.b.ctx)[-1] == "key.refused"


def test_others_cannot_fetch_the_slaves_keys(net, api) -> None:
    r = api(net.a)("sae-a1").get("/api/v1/keys/sae-b1/enc_keys")  # GET form, defaults
    assert r.status_code == 200
    (key_id,) = decoded_keys(r.json())
    net.drain()
    before = snapshot(net.b.ctx)["key_alloc"]
    for who in ("sae-b2", "sae-a1", "sae-a2"):  # third SAE, the master, a stranger's SAE
        r = api(net.b)(who).get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_id}")
        assert r.status_code == 401, who
        assert r.json() == {"message": "unauthorized"}
    # A wrong master in the path is refused the same way.
    r = api(net.b)("sae-b1").get(f"/api/v1/keys/sae-a2/dec_keys?key_ID={key_id}")
    assert r.status_code == 401
    assert snapshot(net.b.ctx)["key_alloc"] == before
    r = api(net.b)("sae-b1").get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_id}")
    assert r.status_code == 200


def test_slave_asking_before_the_message_pulls_it_from_the_owner(net, api) -> None:
    r = api(net.a)("sae-a1").post("/api/v1/keys/sae-b1/enc_keys", json={})
    master = decoded_keys(r.json())

    class InProcessPeers:
        def pending_allocations(self, owner: str) -> list[dict[str, Any]]:
            return outbox.pending_bodies(
                net.nodes[owner].ctx.db, destination="station-b", kind="key.allocated"
            )

    client = api(net.b)("sae-b1")
    app_b = client._client._transport.app.app  # the app behind the test TLS wrapper
    app_b.state.allocation_source = InProcessPeers()
    r = client.post(
        "/api/v1/keys/sae-a1/dec_keys", json={"key_IDs": [{"key_ID": k} for k in master]}
    )
    assert r.status_code == 200, r.text
    assert decoded_keys(r.json()) == master
    net.drain()  # the message arrives later: harmless
    assert net.segments("station-b")  # still consistent


def test_status_reports_what_can_be_served(net, api) -> None:
    r = api(net.a)("sae-a1").get("/api/v1/keys/sae-b1/status")
    assert r.status_code == 200, r.text
    st = r.json()
    owned = sum(
        s.length - s.used
        for s in net.segments("station-a").values()
        if s.owner == "station-a" and s.state == "ready"
    )
    assert st["stored_key_count"] == 8 * owned // st["key_size"]
    assert (st["source_KME_ID"], st["target_KME_ID"]) == ("station-a", "station-b")
    assert (st["master_SAE_ID"], st["slave_SAE_ID"]) == ("sae-a1", "sae-b1")


def test_keys_never_share_a_byte_under_concurrency(net, api) -> None:
    """32 concurrent masters' requests on one station: no byte of pair key is in two
    keys (checked over every delivered key's segment ranges)."""
    from keystrata.delivery import enc_keys
    from keystrata.delivery.schemas import KeyRequest
    from keystrata.registry.principals import Caller
    from keystrata.registry.specs import PrincipalRole

    caller = Caller(principal_id="sae-a1", role=PrincipalRole.SAE, station_id="station-a")
    got: list[enc_keys.DeliveredKey] = []
    errors: list[str] = []
    lock = threading.Lock()
    barrier = threading.Barrier(32)

    def master() -> None:
        barrier.wait()
        try:
            keys = enc_keys.get_keys(net.a.ctx, caller, "sae-b1", KeyRequest(number=2, size=128))
        except Exception as exc:  # 503 when the ready key runs out is an allowed answer
            with lock:
                errors.append(type(exc).__name__)
            return
        with lock:
            got.extend(keys)

    threads = [threading.Thread(target=master) for _ in range(32)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert set(errors) <= {"NotEnoughKey"}, errors
    assert got
    from sqlalchemy import select

    from keystrata.storage.models import KeyAlloc

    with net.a.ctx.db.read() as s:
        rows = s.execute(select(KeyAlloc)).scalars().all()
    import json

    spans: dict[str, list[tuple[int, int]]] = {}
    for row in rows:
        for r in json.loads(row.ranges):
            spans.setdefault(r["segment"], []).append((r["offset"], r["offset"] + r["length"]))
    for segment, ss in spans.items():
        ss.sort()
        for (_, end), (start, _) in itertools.pairwise(ss):
            assert start >= end, f"two keys share bytes of segment {segment}"
    assert len({hashlib.sha256(k.key).digest() for k in got}) == len(got)


BAD_ENC: list[tuple[str, Any]] = [
    ("size-not-multiple-of-8", {"size": 100}),
    ("size-below-min", {"size": 8}),
    ("size-above-max", {"size": 1_048_576}),
    ("number-zero", {"number": 0}),
    ("number-negative", {"number": -3}),
    ("number-huge", {"number": 10**9}),
    ("number-bool", {"number": True}),
    ("number-string", {"number": "2"}),
    ("size-float", {"size": 256.0}),
    # Unknown members are ignored (test_delivery_leniency.py), never a way around a check.
    ("unknown-member-beside-a-bad-size", {"colour": "red", "size": 100}),
    ("mandatory-extension", {"extension_mandatory": [{"abc_route": "x"}]}),
    ("too-many-slaves", {"additional_slave_SAE_IDs": [f"s{i}" for i in range(9)]}),
    ("slaves-not-a-list", {"additional_slave_SAE_IDs": "sae-b2"}),
]


@pytest.mark.parametrize(("name", "body"), BAD_ENC, ids=[b[0] for b in BAD_ENC])
def test_bad_get_key_requests_are_400_and_change_nothing(net, api, name, body) -> None:
    before = snapshot(net.a.ctx)
    r = api(net.a)("sae-a1").post("/api/v1/keys/sae-b1/enc_keys", json=body)
    assert r.status_code == 400, (name, r.text)
    assert set(r.json()) <= {"message", "details"}
    after = snapshot(net.a.ctx)
    assert {k: v for k, v in after.items() if not k.startswith("ledger")} == {
        k: v for k, v in before.items() if not k.startswith("ledger")
    }


def test_more_bad_input(net, api) -> None:
    a1, b1 = api(net.a)("sae-a1"), api(net.b)("sae-b1")
    before_a, before_b = snapshot(net.a.ctx), snapshot(net.b.ctx)
    cases = [
        (
            a1.post(
                "/api/v1/keys/sae-b1/enc_keys",
                content=b"{not json",
                headers={"content-type": "application/json"},
            ),
            400,
        ),
        (
            a1.post(
                "/api/v1/keys/sae-b1/enc_keys",
                content=b"x" * (10 * 1024 * 1024),
                headers={"content-type": "application/json"},
            ),
            400,
        ),
        (a1.get("/api/v1/keys/sae-b1/enc_keys?number=abc"), 400),
        (a1.get("/api/v1/keys/sae-b1/enc_keys?size=-8"), 400),
        (a1.post("/api/v1/keys/nobody/enc_keys", json={}), 401),
        (a1.post("/api/v1/keys/sae-a2/enc_keys", json={}), 401),  # slave at the same station
        (b1.post("/api/v1/keys/sae-a1/dec_keys", json={"key_IDs": []}), 400),
        (b1.post("/api/v1/keys/sae-a1/dec_keys", json={"key_IDs": [{"key_ID": "nope"}]}), 400),
        (b1.get("/api/v1/keys/sae-a1/dec_keys?key_ID=not-a-uuid"), 400),
        (
            b1.post(
                "/api/v1/keys/sae-a1/dec_keys",
                json={"key_IDs": [{"key_ID": "0b0e4b4e-3d3f-4c4c-9d9d-1a1a1a1a1a1a"}] * 2},
            ),
            400,
        ),
        (
            b1.post(
                "/api/v1/keys/sae-a1/dec_keys",
                json={"key_IDs": [{"key_ID": "0b0e4b4e-3d3f-4c4c-9d9d-1a1a1a1a1a1a"}]},
            ),
            401,
        ),
        (api(net.a)("ops-ada").get("/api/v1/keys/sae-b1/status"), 401),  # not an SAE
        (api(net.a)(None).get("/api/v1/keys/sae-b1/status"), 401),
    ]
    for r, status in cases:
        assert r.status_code == status, (r.request.url, r.text)
        assert "message" in r.json()
    for node, before in ((net.a, before_a), (net.b, before_b)):
        after = snapshot(node.ctx)
        assert {k: v for k, v in after.items() if not k.startswith("ledger")} == {
            k: v for k, v in before.items() if not k.startswith("ledger")
        }


def test_quota_and_empty_pool_answer_503(make_node, db_factory, api) -> None:
    # Each station owns one 256-byte segment (2048 bits); the quota is 3000 bits a day.
    net = relaynet.build(make_node, db_factory, policy={"daily_quota_bits": 3000})
    relaynet.provision_saes(net)
    relaynet.ready_key(net, segments=2, size=256)
    a1, b1 = api(net.a)("sae-a1"), api(net.b)("sae-b1")
    assert a1.post("/api/v1/keys/sae-b1/enc_keys", json={"number": 8}).status_code == 200
    r = a1.post("/api/v1/keys/sae-b1/enc_keys", json={"number": 1})  # 2304 <= 3000: pool
    assert r.status_code == 503 and "ready" in r.json()["message"]
    assert b1.post("/api/v1/keys/sae-a1/enc_keys", json={"number": 4}).status_code == 200
    r = b1.post("/api/v1/keys/sae-a1/enc_keys", json={"number": 8})  # 1024 + 2048 > 3000
    assert r.status_code == 503 and "quota" in r.json()["message"]
    assert set(r.json()) <= {"message", "details"}


def test_uncollected_keys_expire_on_both_sides(net, api) -> None:
    from datetime import timedelta

    from keystrata.delivery import slave_copy

    r = api(net.a)("sae-a1").post("/api/v1/keys/sae-b1/enc_keys", json={})
    (key_id,) = decoded_keys(r.json())
    net.drain()

    class Later:
        def __init__(self, clock: Any) -> None:
            self.clock = clock

        def now(self) -> Any:
            return self.clock.now() + timedelta(hours=2)

    import dataclasses

    later_b = dataclasses.replace(net.b.ctx, clock=Later(net.b.ctx.clock))
    assert slave_copy.expire(later_b) == 1
    net.drain()
    assert "key.expired" in ledger_events(net.a.ctx)
    r = api(net.b)("sae-b1").get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_id}")
    assert r.status_code == 401


def test_kek_rotation_reseals_keys_waiting_for_slaves(net, api, tmp_path) -> None:
    from keystrata.config import load_settings
    from keystrata.crypto.kek import read_kek, write_new_kek
    from keystrata.node import kek_rotation
    from keystrata.node.lifecycle import open_node

    r = api(net.a)("sae-a1").post("/api/v1/keys/sae-b1/enc_keys", json={"number": 2})
    master = decoded_keys(r.json())
    net.drain()
    ctx = net.b.ctx
    new_path = tmp_path / "b-new.kek"
    write_new_kek(new_path)
    kek_rotation.rotate(ctx.db, ctx.node_id, read_kek(ctx.settings.kek.file), read_kek(new_path))
    net.b.ctx = open_node(
        load_settings(net.b.config_path, env={"KEYSTRATA_KEK__FILE": str(new_path)}), ctx.db
    )
    r = api(net.b)("sae-b1").post(
        "/api/v1/keys/sae-a1/dec_keys", json={"key_IDs": [{"key_ID": k} for k in master]}
    )
    assert r.status_code == 200, r.text
    assert decoded_keys(r.json()) == master


def test_accounting_per_pair_and_sae(net, api) -> None:
    a1, b1 = api(net.a)("sae-a1"), api(net.b)("sae-b1")
    master = decoded_keys(a1.post("/api/v1/keys/sae-b1/enc_keys", json={"number": 3}).json())
    net.drain()
    first = next(iter(master))
    assert b1.get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={first}").status_code == 200
    assert b1.get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={first}").status_code == 401
    at_a = api(net.a)("aud-ben").get("/api/v1/deliveries").json()
    at_b = api(net.b)("ops-ada").get("/api/v1/deliveries").json()
    (pa,) = at_a["pairs"]
    assert pa["to_masters"] == {"keys": 3, "bits": 768}
    (pb,) = at_b["pairs"]
    assert pb["to_slaves"] == {"keys": 1, "bits": 256}
    assert pb["waiting"] == {"keys": 2, "bits": 512}
    sae_b = {s["sae_id"]: s for s in at_b["saes"]}
    assert sae_b["sae-b1"]["as_slave"] == {"keys": 1, "bits": 256}
    assert sae_b["sae-b1"]["refused"] == 1


def test_key_multicast_to_additional_slaves(net, api) -> None:
    a1 = api(net.a)("sae-a1")
    r = a1.post(
        "/api/v1/keys/sae-b1/enc_keys", json={"number": 1, "additional_slave_SAE_IDs": ["sae-b2"]}
    )
    assert r.status_code == 200, r.text
    master = decoded_keys(r.json())
    (key_id,) = master
    net.drain()
    for slave in ("sae-b1", "sae-b2"):
        r = api(net.b)(slave).get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_id}")
        assert r.status_code == 200, (slave, r.text)
        assert decoded_keys(r.json()) == master
    # Each slave once; after both, the key is destroyed at station B.
    assert (
        api(net.b)("sae-b1").get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_id}").status_code == 401
    )

    from keystrata.storage.models import KeyAlloc

    with net.b.ctx.db.read() as s:
        row = s.get(KeyAlloc, key_id)
        assert row.state == "delivered" and row.sealed is None
    # A slave at another station than the first slave's is refused (401).
    r = a1.post("/api/v1/keys/sae-b1/enc_keys", json={"additional_slave_SAE_IDs": ["sae-a2"]})
    assert r.status_code == 401


def test_when_the_ledger_cannot_be_written_no_key_leaves(net, api) -> None:
    """Fail closed (design invariant 5): Get key answers 503 with the standard's error
    object, hands out nothing, and changes nothing."""
    break_ledger(net.a)
    before = snapshot(net.a.ctx)
    r = api(net.a)("sae-a1").post("/api/v1/keys/sae-b1/enc_keys", json={"number": 2})
    assert r.status_code == 503, r.text
    assert set(r.json()) <= {"message", "details"} and "keys" not in r.json()
    assert "ledger" in r.json()["message"]
    assert snapshot(net.a.ctx) == before
