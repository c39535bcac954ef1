"""Attacks by someone who can write a station's database but does not hold its KEK,
from the attacker's side: re-point a waiting key to another
slave, a segment to another owner, or put back an older sealed value. The sealed value
binds its row's authorisation fields (``storage/sealed.py``), so it no longer opens: no
key leaves, the SAE gets the standard's 401 (or 503 at the owner), and the attempt is
recorded. Real SQLite and PostgreSQL databases, the ASGI app."""

from __future__ import annotations

import json

import pytest
from sqlalchemy import select, update

import relaynet
from helpers import snapshot
from keystrata.storage.models import KeyAlloc, LedgerEntry, NodeMeta, PairSegment


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    net = relaynet.build(make_node, db_factory)
    relaynet.provision_saes(net)
    relaynet.ready_key(net)
    return net


def _allocate(net: relaynet.RelayNet, api, number: int = 2) -> list[str]:
    r = api(net.a)("sae-a1").post("/api/v1/keys/sae-b1/enc_keys", json={"number": number})
    assert r.status_code == 200, r.text
    net.drain()
    return [k["key_ID"] for k in r.json()["keys"]]


def _last_refusal(node) -> dict:
    with node.ctx.db.read() as s:
        raw = s.execute(
            select(LedgerEntry.entry)
            .where(LedgerEntry.event == "key.refused")
            .order_by(LedgerEntry.idx.desc())
            .limit(1)
        ).scalar_one()
    return json.loads(raw)


def test_a_waiting_key_re_pointed_to_another_slave_does_not_open(net, api, caplog) -> None:
    key_ids = _allocate(net, api)
    with net.b.ctx.db.write() as s:
        s.execute(update(KeyAlloc).where(KeyAlloc.key_id.in_(key_ids)).values(slaves='["sae-b2"]'))
    before = snapshot(net.b.ctx)["key_alloc"]
    query = "&".join(f"key_ID={k}" for k in key_ids)
    r = api(net.b)("sae-b2").get(f"/api/v1/keys/sae-a1/dec_keys?{query}")
    assert r.status_code == 401 and r.json() == {"message": "unauthorized"}
    assert snapshot(net.b.ctx)["key_alloc"] == before  # nothing delivered, nothing used
    assert _last_refusal(net.b)["reason"] == "sealed_value_does_not_open"
    assert "tampered" in caplog.text


def test_a_waiting_key_re_pointed_to_another_master_does_not_open(net, api) -> None:
    key_ids = _allocate(net, api, number=1)
    with net.b.ctx.db.write() as s:
        s.execute(update(KeyAlloc).where(KeyAlloc.key_id == key_ids[0]).values(master_sae="sae-a2"))
    r = api(net.b)("sae-b1").get(f"/api/v1/keys/sae-a2/dec_keys?key_ID={key_ids[0]}")
    assert r.status_code == 401
    assert _last_refusal(net.b)["reason"] == "sealed_value_does_not_open"


def test_a_segment_re_pointed_to_this_station_hands_out_nothing(net, api, caplog) -> None:
    """The partner owns half of the segments; the writer makes them this station's."""
    with net.a.ctx.db.write() as s:
        s.execute(update(PairSegment).values(owner="station-a"))
    before = snapshot(net.a.ctx)
    # More than station A's own segments hold: the taking reaches a re-pointed one.
    r = api(net.a)("sae-a1").post("/api/v1/keys/sae-b1/enc_keys", json={"number": 600})
    assert r.status_code == 503 and "integrity" in r.json()["message"]
    after = snapshot(net.a.ctx)
    assert after["key_alloc"] == before["key_alloc"] == []
    assert after["pair_segment"] == before["pair_segment"]
    assert "tampered" in caplog.text


def test_an_older_sealed_value_put_back_does_not_open(net, api) -> None:
    with net.b.ctx.db.read() as s:
        old = {r.segment_id: r.sealed for r in s.execute(select(PairSegment)).scalars()}
    key_ids = _allocate(net, api, number=1)
    with net.b.ctx.db.write() as s:
        for row in s.execute(select(PairSegment)).scalars():
            row.sealed = old[row.segment_id]  # the offset stays where it is now
    # The slave still gets its key (it was sealed on its own); the next allocation from
    # the rolled-back segment does not apply at B.
    r = api(net.b)("sae-b1").get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_ids[0]}")
    assert r.status_code == 200
    more = api(net.a)("sae-a1").post("/api/v1/keys/sae-b1/enc_keys", json={"number": 1})
    assert more.status_code == 200
    before = snapshot(net.b.ctx)["key_alloc"]
    net.drain()
    assert snapshot(net.b.ctx)["key_alloc"] == before


def test_rows_sealed_in_layout_1_move_to_layout_2_when_the_node_opens(net, api) -> None:
    """A database from before layout 2: rows sealed with the row identity only. The
    node seals them again when it opens, then serves them as before."""
    from keystrata.node import reseal
    from keystrata.node.lifecycle import open_node
    from keystrata.storage.sealed import (
        LAYOUT_META,
        key_context,
        legacy_key_context,
        legacy_segment_context,
        segment_context,
    )

    key_ids = _allocate(net, api, number=1)
    ctx = net.b.ctx
    with ctx.db.write() as s:  # write the rows as layout 1 would have
        for row in s.execute(select(PairSegment).where(PairSegment.sealed.is_not(None))).scalars():
            value = ctx.keyring.open(row.sealed, segment_context(row, row.used))
            row.sealed = ctx.keyring.seal(value, legacy_segment_context(row.segment_id, row.used))
        for row in s.execute(select(KeyAlloc).where(KeyAlloc.sealed.is_not(None))).scalars():
            value = ctx.keyring.open(row.sealed, key_context(row))
            row.sealed = ctx.keyring.seal(value, legacy_key_context(row.key_id))
        s.delete(s.get(NodeMeta, LAYOUT_META))
    assert not reseal.is_current(ctx.db)
    net.b.ctx = open_node(ctx.settings, ctx.db)
    assert reseal.is_current(ctx.db)
    assert reseal.reseal(ctx.db, ctx.keyring) == 0  # idempotent
    r = api(net.b)("sae-b1").get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_ids[0]}")
    assert r.status_code == 200
