"""The auditor's ledger search (time, event, pair, SAE, node, segment, key ID, pages),
the hash chain of version 2 entries (RFC 9162 leaf hashes, recomputed here with hashlib)
and the references migration 0006 fills in for older entries."""

from __future__ import annotations

import base64
import hashlib
import json
from datetime import UTC, datetime
from typing import Any

import pytest
from sqlalchemy import insert, select, text, update

import relaynet
from helpers import decoded_keys
from keystrata.delivery import accounting
from keystrata.storage import migrate
from keystrata.storage.db import Database
from keystrata.storage.models import LedgerEntry, LedgerRef


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    return relaynet.with_ready_key(make_node, db_factory)


def _deliver(net, api) -> str:
    r = api(net.a)("sae-a1").post("/api/v1/keys/sae-b1/enc_keys", json={"number": 2})
    assert r.status_code == 200, r.text
    key_ids = list(decoded_keys(r.json()))
    net.drain()
    r = api(net.b)("sae-b1").get(f"/api/v1/keys/sae-a1/dec_keys?key_ID={key_ids[0]}")
    assert r.status_code == 200, r.text
    return key_ids[0]


def _events(answer: dict[str, Any]) -> list[str]:
    return [e["entry"]["event"] for e in answer["entries"]]


def test_search_by_key_sae_pair_and_event(net, api) -> None:
    key_id = _deliver(net, api)
    at_b = api(net.b)("aud-ben")
    found = at_b.get(f"/api/v1/audit/search?key_id={key_id}").json()
    assert _events(found) == ["key.allocated", "key.delivered"]
    assert found["next_after"] is None
    # Upper-case key IDs are the same UUID (RFC 9562 section 4: case-insensitive on input).
    assert at_b.get(f"/api/v1/audit/search?key_id={key_id.upper()}").json() == found
    at_a = api(net.a)("aud-ben")
    assert _events(at_a.get(f"/api/v1/audit/search?key_id={key_id}").json()) == ["key.allocated"]
    by_sae = at_b.get("/api/v1/audit/search?sae=sae-b1&event=key.delivered").json()
    assert [e["entry"]["key_ids"] for e in by_sae["entries"]] == [[key_id]]
    by_pair = at_b.get("/api/v1/audit/search?pair=pair-ab").json()
    assert {"segment.ready", "key.allocated"} <= set(_events(by_pair))
    assert all(
        e["entry"].get("pair") == "pair-ab" or e["entry"].get("id") == "pair-ab"
        for e in by_pair["entries"]
    )
    # Several event names: any of them; filters of different kinds: all of them.
    both = at_b.get(
        "/api/v1/audit/search?event=key.delivered&event=key.allocated&sae=sae-a1"
    ).json()
    assert set(_events(both)) == {"key.allocated", "key.delivered"}
    assert at_b.get(f"/api/v1/audit/search?key_id={key_id}&sae=sae-b2").json()["entries"] == []


def test_search_by_time_and_pages(net, api) -> None:
    _deliver(net, api)
    aud = api(net.b)("aud-ben")
    everything = aud.get("/api/v1/audit/entries").json()["entries"]
    walked: list[dict[str, Any]] = []
    after: int | None = None
    while True:
        page = aud.get(
            "/api/v1/audit/search", params={"limit": 3, **({"after": after} if after else {})}
        ).json()
        walked += page["entries"]
        after = page["next_after"]
        if after is None:
            break
        assert len(page["entries"]) == 3
    assert walked == everything
    middle = everything[len(everything) // 2]["entry"]["at"]
    later = aud.get("/api/v1/audit/search", params={"since": middle, "limit": 1000}).json()
    earlier = aud.get("/api/v1/audit/search", params={"until": middle, "limit": 1000}).json()
    assert len(later["entries"]) + len(earlier["entries"]) == len(everything)
    assert all(e["entry"]["at"] >= middle for e in later["entries"])
    future = aud.get("/api/v1/audit/search?since=2999-01-01T00:00:00%2B00:00").json()
    assert future["entries"] == []


def test_bad_search_requests_are_400(net, api) -> None:
    aud = api(net.b)("aud-ben")
    for query in (
        "event=key.stolen",
        "since=yesterday",
        "since=2026-12-01T00:00:00",  # no offset: ambiguous
        "limit=0",
        "limit=true",
        "limit=1001",
        "after=-1",
        "key_id=not-a-uuid",
        "sae=%00",
        "pair=" + "p" * 65,
    ):
        r = aud.get(f"/api/v1/audit/search?{query}")
        assert r.status_code == 400, query
        assert set(r.json()) == {"message", "details"}
        assert "stolen" not in r.text and "yesterday" not in r.text  # input is not echoed
    assert api(net.b)("sae-b1").get("/api/v1/audit/search").status_code == 403


def test_entries_chain_leaf_hashes(net, api) -> None:
    _deliver(net, api)
    entries = api(net.b)("aud-ben").get("/api/v1/audit/entries").json()["entries"]
    previous: bytes | None = None
    for e in entries:
        raw = base64.b64decode(e["entry_b64"])
        assert e["entry"]["v"] == 2
        expected = None if previous is None else base64.b64encode(previous).decode()
        assert e["entry"]["prev"] == expected, e["index"]
        # RFC 9162 section 2.1.1: leaf hash = SHA-256(0x00 || entry).
        previous = hashlib.sha256(b"\x00" + raw).digest()


def test_a_damaged_entry_is_exported_as_stored(net, api) -> None:
    with net.b.ctx.db.write() as s:
        s.execute(update(LedgerEntry).where(LedgerEntry.idx == 3).values(entry=b'{"v":2,'))
    r = api(net.b)("aud-ben").get("/api/v1/audit/entries?start=3&end=4")
    assert r.status_code == 200
    (e,) = r.json()["entries"]
    assert e == {"index": 3, "entry_b64": base64.b64encode(b'{"v":2,').decode(), "entry": None}


def test_migration_indexes_older_entries(tmp_path) -> None:
    db = Database.from_url(f"sqlite:///{tmp_path}/old.db")
    migrate.upgrade(db.engine, "0005")
    old = [
        {"v": 1, "index": 0, "event": "key.delivered", "sae": "sae-b1", "key_ids": ["k1", "k2"]},
        {"v": 1, "index": 1, "event": "registry.created", "kind": "pairs", "id": "pair-ab"},
        {"v": 1, "index": 2, "event": "auth.refused", "reason": "unknown"},
    ]
    with db.engine.begin() as conn:
        conn.execute(
            insert(LedgerEntry.__table__),
            [
                {
                    "idx": e["index"],
                    "recorded_at": datetime.now(UTC),
                    "event": e["event"],
                    "entry": json.dumps(e).encode(),
                }
                for e in old
            ],
        )
        conn.execute(text("UPDATE ledger_head SET size = 3 WHERE id = 1"))
    migrate.upgrade(db.engine)
    with db.read() as s:
        refs = set(s.execute(select(LedgerRef.kind, LedgerRef.value, LedgerRef.idx)).all())
    assert refs == {
        ("sae", "sae-b1", 0),
        ("key", "k1", 0),
        ("key", "k2", 0),
        ("pair", "pair-ab", 1),
    }
    db.dispose()


def test_accounting_per_day(net, api) -> None:
    _deliver(net, api)
    r = api(net.b)("sae-b2").get(
        "/api/v1/keys/sae-a1/dec_keys?key_ID=00000000-0000-4000-8000-000000000000"
    )
    assert r.status_code == 401
    today = net.a.ctx.clock.now().date().isoformat()

    def day(node: Any, who: str = "aud-ben") -> dict[str, Any]:
        answer = api(node)(who).get("/api/v1/audit/accounting").json()
        (only,) = answer["days"]
        assert only["day"] == today
        return only

    at_a = day(net.a)
    (pair,) = at_a["pairs"]
    assert pair["pair_id"] == "pair-ab"
    assert pair["to_masters"] == {"keys": 2, "bits": 512}
    assert {s["sae_id"]: s["as_master"] for s in at_a["saes"]} == {
        "sae-a1": {"keys": 2, "bits": 512}
    }
    at_b = day(net.b, "ops-ada")  # operators read it too
    (pair,) = at_b["pairs"]
    assert pair["to_slaves"] == {"keys": 1, "bits": 256}
    saes = {s["sae_id"]: s for s in at_b["saes"]}
    assert saes["sae-b1"]["as_slave"] == {"keys": 1, "bits": 256}
    assert saes["sae-b2"]["refused"] == 1
    # At the relay: each segment used KA and KB of its own length plus a 32-byte one-time
    # MAC key from each link (MA and M).
    (relay_day,) = accounting.per_day(net.relay.ctx)["days"]  # the relay has no auditor here
    relayed = {p["pair_id"]: p["relayed"] for p in relay_day["pairs"]}["pair-ab"]
    assert relayed["segments"] > 0
    assert relayed["link_bits"] == 2 * relayed["bits"] + 2 * 256 * relayed["segments"]
    # A range that ends before today holds nothing.
    empty = api(net.a)("aud-ben").get(
        "/api/v1/audit/accounting", params={"until": "2000-01-01T00:00:00Z"}
    )
    assert empty.json()["days"] == []
    assert api(net.a)("sae-a1").get("/api/v1/audit/accounting").status_code == 403
