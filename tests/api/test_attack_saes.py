"""Attacks by SAEs, from the attacker's side: an SAE of a
station that the pair's registry entry does not name takes key as master, or names a
slave the pair does not allow, or drains the pair's daily quota so that the other
encryptors of the pair get nothing. Through the API (ETSI GS QKD 014 routes) with real
databases on SQLite and PostgreSQL; each refusal is the standard's one 401, changes
nothing and is recorded."""

from __future__ import annotations

import pytest
from sqlalchemy import select

import relaynet
from helpers import snapshot
from keystrata.registry import provisioning
from keystrata.registry.specs import Kind, PairChange
from keystrata.storage.models import LedgerEntry


def _restrict(net: relaynet.RelayNet, policy: dict[str, object]) -> None:
    """The operator names who may use pair-ab, at both stations."""
    for node in (net.a, net.b):
        provisioning.change(
            node.ctx, Kind.PAIRS, relaynet.PAIR, PairChange(policy=policy), actor="ops-ada"
        )


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    net = relaynet.build(make_node, db_factory)
    relaynet.provision_saes(net)
    relaynet.ready_key(net)
    return net


def _last_refusal(node) -> bytes:
    with node.ctx.db.read() as s:
        return s.execute(
            select(LedgerEntry.entry)
            .where(LedgerEntry.event == "key.refused")
            .order_by(LedgerEntry.idx.desc())
            .limit(1)
        ).scalar_one()


def test_an_sae_the_pair_does_not_name_cannot_be_master(net, api) -> None:
    _restrict(net, {"masters": ["sae-a1", "sae-b1"], "slaves": ["sae-a1", "sae-b1"]})
    before = snapshot(net.a.ctx)
    for path in ("/api/v1/keys/sae-b1/enc_keys", "/api/v1/keys/sae-b1/status"):
        r = api(net.a)("sae-a2").get(path)
        assert r.status_code == 401 and r.json() == {"message": "unauthorized"}, path
    after = snapshot(net.a.ctx)
    assert after["key_alloc"] == before["key_alloc"]
    assert after["pair_segment"] == before["pair_segment"]
    assert b"saes_not_allowed_in_pair" in _last_refusal(net.a)
    # The named master still gets key.
    assert api(net.a)("sae-a1").get("/api/v1/keys/sae-b1/enc_keys").status_code == 200


def test_a_master_cannot_take_key_for_a_slave_the_pair_does_not_name(net, api) -> None:
    _restrict(net, {"slaves": ["sae-a1", "sae-b1"]})
    before = snapshot(net.a.ctx)["key_alloc"]
    r = api(net.a)("sae-a1").post("/api/v1/keys/sae-b2/enc_keys", json={"number": 1})
    assert r.status_code == 401
    r = api(net.a)("sae-a1").post(
        "/api/v1/keys/sae-b1/enc_keys", json={"additional_slave_SAE_IDs": ["sae-b2"]}
    )
    assert r.status_code == 401
    assert snapshot(net.a.ctx)["key_alloc"] == before


def test_the_slaves_station_refuses_an_allocation_for_a_slave_not_in_the_pair(net, api) -> None:
    """The master's station was told more than the slave's station allows (registries
    out of step, or a hostile owner): the slave's station checks its own entry."""
    r = api(net.a)("sae-a1").post("/api/v1/keys/sae-b2/enc_keys", json={"number": 1})
    assert r.status_code == 200
    key_id = r.json()["keys"][0]["key_ID"]
    provisioning.change(
        net.b.ctx,
        Kind.PAIRS,
        relaynet.PAIR,
        PairChange(policy={"slaves": ["sae-b1", "sae-a1"]}),
        actor="ops-ada",
    )
    before = snapshot(net.b.ctx)["key_alloc"]
    net.drain()
    assert snapshot(net.b.ctx)["key_alloc"] == before
    r = api(net.b)("sae-b2").get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_id}")
    assert r.status_code in (401, 503)


def test_one_sae_cannot_drain_the_pairs_daily_quota(net, api) -> None:
    _restrict(net, {"daily_quota_bits": 8192, "sae_daily_quota_bits": 2048})
    a1, a2 = api(net.a)("sae-a1"), api(net.a)("sae-a2")
    r = a1.post("/api/v1/keys/sae-b1/enc_keys", json={"number": 8, "size": 256})
    assert r.status_code == 200  # 2048 bits: sae-a1's share for today
    r = a1.post("/api/v1/keys/sae-b1/enc_keys", json={"number": 1, "size": 256})
    assert r.status_code == 503 and "SAE's daily quota" in r.json()["message"]
    r = a2.post("/api/v1/keys/sae-b1/enc_keys", json={"number": 8, "size": 256})
    assert r.status_code == 200  # the other encryptor of the pair still gets key
