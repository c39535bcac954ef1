"""The per-process registry snapshot (registry/cache.py) from the attacker's side: a
station process that has served an SAE (its snapshot is warm) must refuse that SAE on
its very next request once any other writer (a second worker process, the command line
on the same database) has retired it, narrowed its pair, retired the pair or opened a
hold. Each writer here is a second node context on its own engine, as another process
would be; nothing tells the serving process but the database."""

from __future__ import annotations

import dataclasses
from collections.abc import Iterator
from datetime import UTC, datetime

import pytest
from sqlalchemy import insert, text

import relaynet
from helpers import ledger_events
from keystrata.context import NodeContext
from keystrata.registry import provisioning
from keystrata.registry.specs import Kind, PairChange
from keystrata.storage.db import Database
from keystrata.storage.models import PairHold

GET_KEY = "/api/v1/keys/sae-b1/enc_keys"


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    return relaynet.with_ready_key(make_node, db_factory)


@pytest.fixture
def other_process(net) -> Iterator[NodeContext]:
    """Station A's database as another process sees it: its own engine, its own state."""
    ctx = net.a.ctx
    db = Database.from_url(ctx.settings.database.url, sqlite_synchronous="NORMAL")
    yield dataclasses.replace(ctx, db=db, process_state={})
    db.dispose()


def _warm(client) -> None:
    for _ in range(2):  # the second request is served from the snapshot
        r = client.post(GET_KEY, json={"size": 256})
        assert r.status_code == 200, r.text


def test_an_sae_retired_by_another_process_is_refused_at_once(net, api, other_process) -> None:
    a1 = api(net.a)("sae-a1")
    _warm(a1)
    provisioning.retire(other_process, Kind.PRINCIPALS, "sae-a1", actor="op-elsewhere")
    r = a1.post(GET_KEY, json={"size": 256})
    assert r.status_code == 401 and r.json() == {"message": "unauthorized"}


def test_a_pair_narrowed_by_another_process_refuses_at_once(net, api, other_process) -> None:
    a1, a2 = api(net.a)("sae-a1"), api(net.a)("sae-a2")
    _warm(a1)
    _warm(a2)
    change = PairChange(policy={"masters": ["sae-a2"]})
    provisioning.change(other_process, Kind.PAIRS, relaynet.PAIR, change, actor="op-elsewhere")
    assert a1.post(GET_KEY, json={"size": 256}).status_code == 401
    assert a2.post(GET_KEY, json={"size": 256}).status_code == 200
    assert ledger_events(net.a.ctx)[-2] == "key.refused"


def test_a_hold_opened_by_another_process_stops_delivery_at_once(net, api, other_process) -> None:
    a1 = api(net.a)("sae-a1")
    _warm(a1)
    with other_process.db.write() as s:
        s.execute(
            insert(PairHold).values(
                pair_id=relaynet.PAIR,
                partner="station-b",
                behind="self",
                reason="owner_behind",
                segments=1,
                bytes_behind=32,
                detected_at=datetime.now(UTC),
            )
        )
    r = a1.post(GET_KEY, json={"size": 256})
    assert r.status_code == 503, r.text


def test_every_registry_write_raises_the_generation(net) -> None:
    """The triggers of migration 0011 on the watched tables, on this backend."""
    db = net.a.ctx.db

    def generation() -> int:
        return int(db.peek("SELECT value FROM registry_generation WHERE id = 1"))

    for table, column in (
        ("registry_node", "description"),
        ("qkd_link", "description"),
        ("pair", "priority"),
        ("principal", "description"),
    ):
        before = generation()
        with db.write() as s:
            s.execute(text(f"UPDATE {table} SET {column} = {column}"))
        assert generation() > before, table
    unrelated = generation()
    with db.write() as s:  # a table the snapshot holds nothing of
        s.execute(text("UPDATE pair_segment SET used = used"))
    assert generation() == unrelated
