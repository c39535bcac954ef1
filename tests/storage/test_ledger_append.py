"""``chain.append_many`` (driver SQL, prepared entries, one head read) writes exactly
the rows the straightforward way writes: each entry as ``rfc8785.dumps`` of its body
(the reference package), inserted through the ORM; every perfect subtree of the RFC 9162
tree (section 2.1.1, computed here from its definition); the head's size and right
edge. Both databases are compared table by table, on SQLite and PostgreSQL.

Also: the previous leaf is read from the table when this process did not write it (a
restart, another process), a rolled-back append leaves no trace in what follows, and a
write that fails writes none of the batch (fail closed)."""

from __future__ import annotations

import base64
import hashlib
from collections.abc import Callable
from datetime import UTC, datetime, timedelta, timezone
from typing import Any

import pytest
import rfc8785
from sqlalchemy import insert, select, update

from helpers import mth
from keystrata.errors import Unavailable
from keystrata.ledger import chain
from keystrata.ledger.entries import ENTRY_VERSION, Event, references, timestamp
from keystrata.storage.db import Database
from keystrata.storage.models import LedgerEntry, LedgerHead, LedgerNode, LedgerRef

T0 = datetime(2026, 12, 3, 14, 0, tzinfo=UTC)
PLUS_TWO = timezone(timedelta(hours=2))
Batch = list[tuple[datetime, Event, dict[str, Any]]]


def get_key_fields(i: int) -> dict[str, Any]:
    return {"pair": "pair-ab", "master": "sae-a1", "slaves": ["sae-b1", "sae-b2"],
            "size_bits": 256, "key_ids": [f"{i:08x}-0000-4000-8000-000000000000"],
            "segments": [f"seg-{i // 5}"], "delivered_to": "sae-a1"}  # fmt: skip


def batches() -> list[Batch]:
    """Batch sizes crossing powers of two from several starting sizes, timestamps in
    UTC and at another offset."""
    out: list[Batch] = []
    n = 0
    for size in (1, 2, 3, 16, 1, 5, 31, 7, 16, 2):
        batch: Batch = []
        for _ in range(size):
            at = T0 + timedelta(milliseconds=n)
            if n % 3 == 1:
                at = at.astimezone(PLUS_TWO)
            event = Event.KEY_ALLOCATED if n % 4 else Event.RELAY_SEGMENT_MADE
            fields: dict[str, Any] = get_key_fields(n)
            if n % 4 == 0:
                fields = {"segment": f"seg-{n}", "epsilon": 1.5e-10 * n, "owner": "station-a",
                          "note": "caf\u00e9 \U0001f511", "extra": None}  # fmt: skip
            batch.append((at, event, fields))
            n += 1
        out.append(batch)
    return out


def reference_write(db: Database, node: str, all_batches: list[Batch]) -> None:
    """The rows the ledger must hold, written the plain way in one transaction."""
    raw: list[bytes] = []
    rows, refs = [], []
    for at, event, fields in (e for b in all_batches for e in b):
        prev = None if not raw else hashlib.sha256(b"\x00" + raw[-1]).digest()
        link = None if prev is None else base64.b64encode(prev).decode()
        body = {"v": ENTRY_VERSION, "index": len(raw), "event": str(event), "node": node,
                "at": timestamp(at), "prev": link, **fields}  # fmt: skip
        refs += [{"kind": str(k), "value": v, "idx": len(raw)} for k, v in references(fields)]
        rows.append({"idx": len(raw), "recorded_at": at, "event": str(event)})
        raw.append(rfc8785.dumps(body))
    for row, entry in zip(rows, raw, strict=True):
        row["entry"] = entry
    nodes = []  # every perfect subtree: H(h, i) = MTH(D[i * 2**h : (i + 1) * 2**h])
    level = 0
    while 1 << level <= len(raw):
        for i in range(len(raw) >> level):
            nodes.append(
                {"level": level, "idx": i, "hash": mth(raw[i << level : (i + 1) << level])}
            )
        level += 1
    edge, start = b"", 0  # the perfect subtrees decomposing [0, n), largest first
    for level in range(len(raw).bit_length() - 1, -1, -1):
        if len(raw) >> level & 1:
            edge += mth(raw[start : start + (1 << level)])
            start += 1 << level
    with db.write() as s:
        s.execute(insert(LedgerEntry), rows)
        s.execute(insert(LedgerNode), nodes)
        s.execute(insert(LedgerRef), refs)
        s.execute(update(LedgerHead).where(LedgerHead.id == 1).values(size=len(raw), frontier=edge))


def dump(db: Database) -> dict[str, list[tuple[Any, ...]]]:
    """Every ledger row, timestamps also as the database's own text."""
    queries = {
        "entry": "SELECT idx, CAST(recorded_at AS TEXT), event, entry FROM ledger_entry",
        "node": "SELECT level, idx, hash FROM ledger_node",
        "ref": "SELECT kind, value, idx FROM ledger_ref",
        "head": "SELECT id, size, frontier FROM ledger_head",
    }
    with db.read() as s:
        conn = s.connection()
        out = {k: sorted(tuple(bytes(v) if isinstance(v, memoryview) else v for v in r)
                         for r in conn.exec_driver_sql(q)) for k, q in queries.items()}  # fmt: skip
        out["recorded"] = sorted(
            (r.idx, r.recorded_at) for r in s.query(LedgerEntry.idx, LedgerEntry.recorded_at)
        )
    return out


def test_append_many_writes_what_the_plain_way_writes(db_factory: Callable[[], str]) -> None:
    fast, plain = Database.from_url(db_factory()), Database.from_url(db_factory())
    try:
        assert dump(fast)["head"] == [(1, 0, None)]  # a fresh ledger
        written = []
        for number, batch in enumerate(batches()):
            if number % 3 == 2:
                chain._LAST_LEAF.clear()  # as after a restart: the last leaf is read
            with fast.write() as s:
                written += chain.append_many(s, node_id="station-a", entries=batch)
        reference_write(plain, "station-a", batches())
        got, expected = dump(fast), dump(plain)
        assert written == list(range(len(got["entry"])))
        assert len(got["entry"]) == sum(len(b) for b in batches()) == 84
        for table in expected:
            assert got[table] == expected[table], table
        with fast.read() as s:
            size, root = chain.StoredTree(s).head()
        assert (size, root) == (84, mth([row[3] for row in expected["entry"]]))
    finally:
        fast.dispose()
        plain.dispose()


def test_a_rolled_back_append_leaves_no_trace(db_url: str) -> None:
    db = Database.from_url(db_url)
    try:
        first: Batch = [(T0, Event.KEY_ALLOCATED, get_key_fields(i)) for i in range(3)]
        with db.write() as s:
            chain.append_many(s, node_id="n", entries=first)
        with pytest.raises(RuntimeError), db.write() as s:
            chain.append_many(s, node_id="n", entries=[(T0, Event.KEY_EXPIRED, {"n": 1})])
            raise RuntimeError("the caller's change fails after its entry was appended")
        later: Batch = [(T0, Event.KEY_DELIVERED, {"n": 2}), (T0, Event.KEY_DELIVERED, {})]
        with db.write() as s:
            assert chain.append_many(s, node_id="n", entries=later) == [3, 4]
        entries = [row[3] for row in dump(db)["entry"]]
        assert b"key.expired" not in b"".join(entries)
        prev = hashlib.sha256(b"\x00" + entries[2]).digest()
        assert b'"prev":"' + base64.b64encode(prev) + b'"' in entries[3]
        with db.read() as s:
            assert chain.StoredTree(s).head() == (5, mth(entries))
    finally:
        db.dispose()


def test_a_failed_write_writes_none_of_the_batch(db_url: str) -> None:
    db = Database.from_url(db_url)
    try:
        with db.write() as s:
            chain.append_many(s, node_id="n", entries=[(T0, Event.KEY_DELIVERED, {})])
        with db.write() as s:  # a stray row where the third new entry goes
            s.execute(insert(LedgerEntry).values(idx=3, recorded_at=T0, event="x", entry=b"{}"))
        before = dump(db)
        with pytest.raises(Unavailable), db.write() as s:
            chain.append_many(
                s, node_id="n", entries=[(T0, Event.KEY_DELIVERED, {"i": i}) for i in range(4)]
            )
        assert dump(db) == before
    finally:
        db.dispose()


def test_naive_times_are_refused_as_the_column_refuses_them(db_url: str) -> None:
    db = Database.from_url(db_url)
    try:
        before = dump(db)
        naive = T0.replace(tzinfo=None)
        with pytest.raises(ValueError, match="naive"), db.write() as s:
            chain.append_many(s, node_id="n", entries=[(naive, Event.KEY_DELIVERED, {})])
        assert dump(db) == before
    finally:
        db.dispose()


def test_deferred_appends_write_in_order_at_the_end(db_factory: Callable[[], str]) -> None:
    """Entries appended inside ``chain.deferred`` are the entries appended one by one, in
    the same order; the ones after a mark that was rolled back are not written."""
    deferred, plain = Database.from_url(db_factory()), Database.from_url(db_factory())
    try:
        kept = [(T0, Event.KEY_ALLOCATED, get_key_fields(i)) for i in range(5)]
        with deferred.write() as s, chain.deferred(s, node_id="n") as held:
            for i, entry in enumerate(kept):
                assert chain.append(s, node_id="n", **_kw(entry)) == -1
                mark = held.mark()
                chain.append(s, node_id="n", at=T0, event=Event.KEY_EXPIRED, fields={"i": i})
                held.back_to(mark)  # as a savepoint that rolled back
        with plain.write() as s:
            for entry in kept:
                chain.append(s, node_id="n", **_kw(entry))
        assert dump(deferred) == dump(plain)
        with deferred.write() as s, pytest.raises(RuntimeError), chain.deferred(s, node_id="n"):
            chain.append(s, node_id="n", at=T0, event=Event.KEY_EXPIRED, fields={})
            raise RuntimeError("the run fails: none of its entries is written")
        assert dump(deferred) == dump(plain)
    finally:
        deferred.dispose()
        plain.dispose()


def _kw(entry: tuple[datetime, Event, dict[str, Any]]) -> dict[str, Any]:
    at, event, fields = entry
    return {"at": at, "event": event, "fields": fields}


def test_deferred_appends_leave_the_head_free_until_the_end(
    pg_factory: Callable[[], str],
) -> None:
    """The reason for ``chain.deferred``: a run that appended for its first change does not
    hold the ledger head while it locks the rows of the next ones (PostgreSQL: another
    connection can still take the head's row lock without waiting)."""
    url = pg_factory()
    db, probe = Database.from_url(url), Database.from_url(url)
    try:

        def head_free() -> bool:
            with probe.read() as other:
                row = other.execute(
                    select(LedgerHead.id).where(LedgerHead.id == 1).with_for_update(nowait=True)
                ).first()
                return row is not None

        with db.write() as s, chain.deferred(s, node_id="n"):
            chain.append(s, node_id="n", at=T0, event=Event.KEY_ALLOCATED, fields={"i": 1})
            s.flush()
            assert head_free()
        with db.write() as s:
            chain.append(s, node_id="n", at=T0, event=Event.KEY_ALLOCATED, fields={"i": 2})
            with pytest.raises(Unavailable):  # the lock is not available (NOWAIT)
                head_free()
    finally:
        probe.dispose()
        db.dispose()
