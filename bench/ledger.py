"""Ledger figures: appends per second (``services.ledger.append``, one entry per write
transaction, as every use case does) and the time of RFC 9162 inclusion and consistency
proofs (``services.ledger.StoredTree``) on a ledger of a million entries.

A million appends one by one would take most of an hour, so the big ledger is built in
bulk the way migration 0004 builds the tree for old entries: entries are encoded, their
leaf hashes fed to ``domain.merkle.append`` in large batches, and the entries, every
perfect subtree and the right edge (``ledger_head.frontier``) are inserted directly.
The entry bytes are exactly what ``domain.ledger.encode_entry`` makes (checked on a
sample; RFC 8785 encoding of each entry one by one would cost a minute alone), and each
entry names its predecessor's leaf hash, as real ones do.
"""

from __future__ import annotations

import base64
import os
import random
import time
from collections.abc import Iterator
from datetime import UTC, datetime
from typing import Any

from sqlalchemy import update

from bench import common, profiling
from bench.common import Figure, Workspace, percentile
from keystrata.ledger import chain, merkle
from keystrata.ledger.entries import Event, encode_entry, timestamp
from keystrata.ledger.frontier import Frontier
from keystrata.storage import migrate
from keystrata.storage.db import Database
from keystrata.storage.models import LedgerEntry, LedgerHead

NODE = "station-a"
BATCH = 50_000
AT = datetime(2026, 12, 1, 10, 0, tzinfo=UTC)
AT_TEXT = timestamp(AT)


def _key_id(index: int) -> str:
    return f"{index:08x}-0000-4000-8000-000000000000"


def _fields(index: int) -> dict[str, Any]:
    return {"sae": "sae-b1", "master": "sae-a1", "key_ids": [_key_id(index)]}


def _entry(index: int, prev: bytes | None) -> bytes:
    """The canonical bytes ``encode_entry`` gives a ``key.delivered`` entry (RFC 8785:
    keys sorted, no spaces), written out for speed."""
    p = "null" if prev is None else '"' + base64.b64encode(prev).decode() + '"'
    return (
        f'{{"at":"{AT_TEXT}","event":"key.delivered","index":{index},'
        f'"key_ids":["{_key_id(index)}"],"master":"sae-a1","node":"{NODE}",'
        f'"prev":{p},"sae":"sae-b1","v":2}}'
    ).encode()


def _check_encoding(index: int, prev: bytes | None, fast: bytes) -> None:
    slow = encode_entry(
        index=index,
        event=Event.KEY_DELIVERED,
        node_id=NODE,
        at=AT,
        fields=_fields(index),
        prev=prev,
    )
    if slow != fast:
        raise RuntimeError("the bench's entry encoding no longer matches encode_entry")


def open_database(url: str) -> Database:
    """A migrated database with the node's engine settings."""
    db = Database.from_url(url, sqlite_synchronous=common.SQLITE_SYNCHRONOUS)
    migrate.upgrade(db.engine)
    return db


def build(db: Database, size: int) -> None:
    """Fill an empty, migrated ledger with ``size`` entries and their Merkle tree."""
    edge = Frontier(0, None)
    prev: bytes | None = None
    done = 0
    while done < size:
        n = min(BATCH, size - done)
        entries = []
        leaves = []
        for index in range(done, done + n):
            entry = _entry(index, prev)
            if index < 3 or index % 99_991 == 0:
                _check_encoding(index, prev, entry)
            prev = merkle.leaf_hash(entry)
            entries.append(entry)
            leaves.append(prev)
        nodes = merkle.append(edge, done, leaves)
        blob = edge.advance(nodes, done + n)
        _insert(db, done, entries, nodes)
        done += n
        edge = Frontier(done, blob)
    with db.write() as s:
        s.execute(update(LedgerHead).where(LedgerHead.id == 1).values(size=size, frontier=blob))


def _insert(
    db: Database, start: int, entries: list[bytes], nodes: list[tuple[int, int, bytes]]
) -> None:
    with db.write() as s:
        if db.backend == "postgresql":
            # COPY in text form, bytea as hex (PostgreSQL documentation, "COPY" and
            # "Binary Data Types"): much faster than a row-by-row adapter.
            at = AT.isoformat()
            event = str(Event.KEY_DELIVERED)
            raw: Any = s.connection().connection.driver_connection
            with raw.cursor() as cur:
                with cur.copy(
                    "COPY ledger_entry (idx, recorded_at, event, entry) FROM STDIN"
                ) as cp:
                    cp.write(
                        "".join(
                            f"{i}\t{at}\t{event}\t\\\\x{e.hex()}\n"
                            for i, e in enumerate(entries, start=start)
                        )
                    )
                with cur.copy("COPY ledger_node (level, idx, hash) FROM STDIN") as cp:
                    cp.write("".join(f"{lv}\t{ix}\t\\\\x{h.hex()}\n" for lv, ix, h in nodes))
            return
        conn = s.connection()
        recorded = LedgerEntry.__table__.c.recorded_at.type.bind_processor(conn.dialect)
        when: Any = AT if recorded is None else recorded(AT)
        event = str(Event.KEY_DELIVERED)
        conn.exec_driver_sql(
            "INSERT INTO ledger_entry (idx, recorded_at, event, entry) VALUES (?, ?, ?, ?)",
            [(i, when, event, e) for i, e in enumerate(entries, start=start)],
        )
        conn.exec_driver_sql("INSERT INTO ledger_node (level, idx, hash) VALUES (?, ?, ?)", nodes)


def _timed(samples: Iterator[Any], run: Any) -> list[float]:
    out = []
    for sample in samples:
        t = time.perf_counter()
        run(sample)
        out.append((time.perf_counter() - t) * 1000)
    return out


def proof_times(db: Database, samples: int, seed: int = 6) -> tuple[list[float], list[float]]:
    """Milliseconds per inclusion proof and per consistency proof against the whole
    ledger, each in its own read transaction (as one API request makes it), for
    random indexes. A few proofs are checked against the tree head first."""
    rng = random.Random(seed)  # noqa: S311 - reproducible sample of indexes, not a key
    with db.read() as s:
        tree = chain.StoredTree(s)
        size, root = tree.head()
        for index in (0, size // 2, size - 1, rng.randrange(size)):
            entry = s.get(LedgerEntry, index)
            assert entry is not None
            proof = tree.inclusion_proof(index, size)
            merkle.verify_inclusion(merkle.leaf_hash(entry.entry), index, size, proof, root)
        for old in (1, size // 3, size - 1):
            proof = tree.consistency_proof(old, size)
            merkle.verify_consistency(old, size, merkle.root(tree, old), root, proof)

    def inclusion(index: int) -> None:
        with db.read() as s:
            chain.StoredTree(s).inclusion_proof(index, size)

    def consistency(old: int) -> None:
        with db.read() as s:
            chain.StoredTree(s).consistency_proof(old, size)

    inc = _timed((rng.randrange(size) for _ in range(samples)), inclusion)
    con = _timed((rng.randrange(1, size) for _ in range(samples)), consistency)
    return inc, con


def appends_per_second(db: Database, seconds: float) -> float:
    """Entries appended per second, one per write transaction, for ``seconds``."""
    count = 0
    start = time.perf_counter()
    end = start + seconds
    while time.perf_counter() < end:
        with db.write() as s:
            chain.append(
                s,
                node_id=NODE,
                at=datetime.now(UTC),
                event=Event.KEY_DELIVERED,
                fields=_fields(10**9 + count),
            )
        count += 1
    return count / (time.perf_counter() - start)


def measure(ws: Workspace, backend: str, size: int, samples: int, seconds: float) -> list[Figure]:
    """Build a ``size``-entry ledger on ``backend`` (sqlite or postgresql), time proofs,
    then appends on top of it."""
    label = "SQLite" if backend == "sqlite" else "PostgreSQL"
    url = ws.sqlite_url("ledger") if backend == "sqlite" else ws.pg_url("ledger")
    db = open_database(url)
    try:
        started = time.perf_counter()
        build(db, size)
        built = time.perf_counter() - started
        with profiling.record(os.getpid(), f"ledger-{backend}-proofs"):
            inc, con = proof_times(db, samples)
        rate = appends_per_second(db, seconds)
    finally:
        db.dispose()
    at = f"{size:,} entries, {label}"
    note = f"built in {built:.0f} s; {samples} random indexes"
    return [
        Figure(f"ledger append, 1 per transaction ({label})", rate, "appends/s"),
        Figure(f"ledger inclusion proof p50 ({at})", percentile(inc, 50), "ms", note=note),
        Figure(f"ledger inclusion proof p99 ({at})", percentile(inc, 99), "ms"),
        Figure(f"ledger consistency proof p50 ({at})", percentile(con, 50), "ms"),
        Figure(f"ledger consistency proof p99 ({at})", percentile(con, 99), "ms"),
    ]
