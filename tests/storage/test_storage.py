"""Storage: migrations match the models, SQLite pragmas, sealed rows bound to their row."""

from __future__ import annotations

import threading
import uuid
from datetime import UTC, datetime

import pytest
from sqlalchemy import select, text, update

from keystrata.crypto.hazmat import random_bytes
from keystrata.errors import SealBroken
from keystrata.links import ingest
from keystrata.links.blocks import BlockIn
from keystrata.storage import migrate
from keystrata.storage.db import Database
from keystrata.storage.models import LinkBlock
from keystrata.storage.sealed import block_context


def test_migrations_and_models_do_not_drift(db_url: str) -> None:
    # The same check as `alembic check` (warehouse does this in CI).
    db = Database.from_url(db_url)
    try:
        assert migrate.current_revision(db.engine) == migrate.head_revision(db.engine)
        assert migrate.drift(db.engine) == []
    finally:
        db.dispose()


def test_sqlite_pragmas(tmp_path) -> None:
    db = Database.from_url(f"sqlite:///{tmp_path}/p.db")
    try:
        with db.read() as s:
            assert s.execute(text("PRAGMA journal_mode")).scalar() == "wal"
            assert s.execute(text("PRAGMA secure_delete")).scalar() == 1
            assert s.execute(text("PRAGMA foreign_keys")).scalar() == 1
    finally:
        db.dispose()


def test_sqlite_write_transactions_take_the_lock_first(tmp_path) -> None:
    """Two writers that read-then-write never interleave: BEGIN IMMEDIATE serialises them
    (a plain deferred BEGIN would let both read 0 and both write 1)."""
    db = Database.from_url(f"sqlite:///{tmp_path}/lock.db")
    with db.write() as s:
        s.execute(text("CREATE TABLE counter (n INTEGER)"))
        s.execute(text("INSERT INTO counter VALUES (0)"))
    barrier = threading.Barrier(8)

    def bump() -> None:
        barrier.wait()
        for _ in range(25):
            with db.write() as s:
                n = s.execute(text("SELECT n FROM counter")).scalar_one()
                s.execute(text("UPDATE counter SET n = :n"), {"n": n + 1})

    threads = [threading.Thread(target=bump) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    with db.read() as s:
        assert s.execute(text("SELECT n FROM counter")).scalar_one() == 200
    db.dispose()


def _ingest_two(station) -> tuple[bytes, bytes]:
    k1, k2 = random_bytes(64), random_bytes(64)
    now = datetime.now(UTC)
    blocks = [BlockIn(str(uuid.uuid4()), k, 0.02, 1e-10, now) for k in (k1, k2)]
    ingest.ingest(station.ctx, "link-a", blocks, actor="t", actor_link="link-a")
    return k1, k2


def test_sealed_row_opens_only_in_place(station) -> None:
    k1, _ = _ingest_two(station)
    ctx = station.ctx
    with ctx.db.read() as s:
        a, b = s.execute(select(LinkBlock).order_by(LinkBlock.seq)).scalars().all()
    assert ctx.keyring.open(a.sealed, block_context(a.link_id, a.block_id, a.used)) == k1
    # Key bytes are not stored in the clear anywhere in the row.
    assert k1 not in a.sealed
    # Swap the sealed values of the two rows directly in the database.
    with ctx.db.write() as s:
        s.execute(update(LinkBlock).where(LinkBlock.seq == a.seq).values(sealed=b.sealed))
        s.execute(update(LinkBlock).where(LinkBlock.seq == b.seq).values(sealed=a.sealed))
    with ctx.db.read() as s:
        moved = s.get(LinkBlock, a.seq)
        with pytest.raises(SealBroken):
            ctx.keyring.open(moved.sealed, block_context(moved.link_id, moved.block_id, moved.used))
    # The same row with another offset is another identity as well.
    with pytest.raises(SealBroken):
        ctx.keyring.open(a.sealed, block_context(a.link_id, a.block_id, a.used + 1))


def test_block_rows_refuse_impossible_states(station) -> None:
    _ingest_two(station)
    with station.ctx.db.read() as s:
        seq = s.execute(select(LinkBlock.seq)).scalars().first()
    with pytest.raises(Exception, match=r"(?i)check|constraint"), station.ctx.db.write() as s:
        s.execute(update(LinkBlock).where(LinkBlock.seq == seq).values(used=10_000))
