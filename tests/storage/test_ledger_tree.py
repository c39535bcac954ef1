"""The ledger's Merkle tree in the database: written in the same transaction as each
entry, equal to an independent recomputation from the raw entries (RFC 9162 section
2.1 definitions, written out in tests/helpers.py), with proofs that verify; and built for entries
written before the tree existed (migration 0004)."""

from __future__ import annotations

import threading

from sqlalchemy import insert, text

from helpers import ledger_entries, mth
from keystrata.ledger import chain, merkle
from keystrata.ledger.entries import Event
from keystrata.storage import migrate
from keystrata.storage.db import Database
from keystrata.storage.models import LedgerEntry


def test_stored_tree_matches_the_entries_and_proves(station) -> None:
    db = station.ctx.db
    entries = ledger_entries(db)
    assert len(entries) > 10  # the seeded registry wrote entries
    with db.read() as s:
        tree = chain.StoredTree(s)
        size, root = tree.head()
        assert size == len(entries)
        assert root == mth(entries)
        for index in range(size):
            proof = tree.inclusion_proof(index, size)
            merkle.verify_inclusion(merkle.leaf_hash(entries[index]), index, size, proof, root)
        for old in range(1, size):
            proof = tree.consistency_proof(old, size)
            merkle.verify_consistency(old, size, mth(entries[:old]), root, proof)


def test_concurrent_appends_keep_one_tree(db_url) -> None:
    db = Database.from_url(db_url)
    from datetime import UTC, datetime

    def writer(n: int) -> None:
        for i in range(15):
            with db.write() as s:
                chain.append(
                    s,
                    node_id="x",
                    at=datetime.now(UTC),
                    event=Event.AUTH_REFUSED,
                    fields={"writer": n, "i": i},
                )

    threads = [threading.Thread(target=writer, args=(n,)) for n in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    entries = ledger_entries(db)
    with db.read() as s:
        size, root = chain.StoredTree(s).head()
    assert size == len(entries) == 90
    assert root == mth(entries)
    db.dispose()


def test_migration_builds_the_tree_for_existingledger_entries(tmp_path) -> None:
    db = Database.from_url(f"sqlite:///{tmp_path}/old.db")
    migrate.upgrade(db.engine, "0003")
    raw = [f'{{"i":{i}}}'.encode() for i in range(37)]
    from datetime import UTC, datetime

    with db.engine.begin() as conn:
        conn.execute(
            insert(LedgerEntry.__table__),
            [
                {
                    "idx": i,
                    "recorded_at": datetime.now(UTC),
                    "event": "x",
                    "entry": e,
                }
                for i, e in enumerate(raw)
            ],
        )
        conn.execute(text("UPDATE ledger_head SET size = 37 WHERE id = 1"))
    migrate.upgrade(db.engine)
    with db.read() as s:
        size, root = chain.StoredTree(s).head()
    assert (size, root) == (37, mth(raw))
    # Appends after the migration extend the same tree.
    with db.write() as s:
        chain.append(
            s, node_id="x", at=datetime.now(UTC), event=Event.AUTH_REFUSED, fields={"after": True}
        )
    with db.read() as s:
        size, root = chain.StoredTree(s).head()
    assert (size, root) == (38, mth(ledger_entries(db)))
    db.dispose()
