"""Link key bytes at the relay: the paged read of available blocks and the free-byte
sums the scheduler budgets with, checked against a plain scan of every block row; and a
binary ingest stored in slices, still one transaction.

The reference values are computed here from all ``link_block`` rows with Python sums,
independently of the queries under test (paging with LIMIT and keyset, SQL SUM)."""

from __future__ import annotations

import json
import os
import uuid
from datetime import UTC, datetime

import pytest
from sqlalchemy import select

import relaynet
from keystrata.errors import BlockConflict
from keystrata.links import consume, ingest
from keystrata.links.blocks import BlockIn
from keystrata.ranges import Available, Range
from keystrata.relay import operation
from keystrata.storage.models import LedgerEntry, LinkBlock


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    return relaynet.build(make_node, db_factory)


def _scan(ctx, link_id: str) -> list[Available]:
    """Every block of the link with unused bytes, oldest first: the whole table read."""
    with ctx.db.read() as s:
        rows = s.execute(select(LinkBlock).where(LinkBlock.link_id == link_id)).scalars().all()
    return [
        Available(r.block_id, r.used, r.length, r.epsilon)
        for r in sorted(rows, key=lambda r: r.seq)
        if r.used < r.length
    ]


def _expected(blocks: list[Available], limit: int) -> list[Available]:
    out, have = [], 0
    for b in blocks:
        out.append(b)
        have += b.length - b.used
        if have >= limit:
            break
    return out


def _feed_uneven(net: relaynet.RelayNet, station: str, sizes: list[int]) -> None:
    for size in sizes:
        net.feed(station, 1, block_bytes=size)


def test_available_reads_in_pages_and_matches_a_full_scan(net, monkeypatch) -> None:
    """Pages of 3 blocks over 11 uneven blocks, some partly used: every limit, from one
    byte to more than the link holds, gives exactly the oldest blocks covering it."""
    monkeypatch.setattr(consume, "PAGE_BLOCKS", 3)
    sizes = [100, 4096, 64, 1000, 333, 2048, 50, 777, 4096, 128, 900]
    _feed_uneven(net, "station-a", sizes)
    _feed_uneven(net, "station-b", [sum(sizes) + 64])
    # Use some bytes from the front so that the first blocks are gone or partly used.
    operation.make_segment(net.relay.ctx, relaynet.PAIR, 4500, cipher_station="station-b")
    ctx = net.relay.ctx
    every = _scan(ctx, "link-a")
    assert every[0].used > 0, "the first remaining block is partly used"
    total = sum(b.length - b.used for b in every)
    limits = [1, every[0].length - every[0].used, total - 1, total, total + 1, 2**62]
    limits += [sum(b.length - b.used for b in every[:k]) for k in range(1, len(every) + 1)]
    with ctx.db.read() as s:
        for limit in limits:
            assert consume.available(s, "link-a", limit) == _expected(every, limit), limit


def test_available_stops_at_the_page_that_covers_the_limit(net, monkeypatch) -> None:
    """A segment reads the pages it needs, not the link: count the statements."""
    from sqlalchemy import event

    monkeypatch.setattr(consume, "PAGE_BLOCKS", 4)
    net.feed("station-a", 40, block_bytes=100)
    ctx = net.relay.ctx
    selects: list[str] = []

    def count(conn, cursor, statement, *args) -> None:  # type: ignore[no-untyped-def]
        if "FROM link_block" in statement:
            selects.append(statement)

    engine = ctx.db.engine
    event.listen(engine, "before_cursor_execute", count)
    try:
        with ctx.db.read() as s:
            got = consume.available(s, "link-a", 950)
    finally:
        event.remove(engine, "before_cursor_execute", count)
    assert len(got) == 10
    assert len(selects) == 3  # pages of 4, 4, and the third covers byte 950


def test_free_bytes_equal_the_sum_over_every_block(net) -> None:
    _feed_uneven(net, "station-a", [4096, 100, 5000, 64])
    _feed_uneven(net, "station-b", [9000, 333])
    operation.make_segment(net.relay.ctx, relaynet.PAIR, 4200, cipher_station="station-b")
    operation.make_segment(net.relay.ctx, relaynet.PAIR, 100, cipher_station="station-a")
    ctx = net.relay.ctx
    with ctx.db.read() as s:
        free = consume.free_bytes(s, ["link-b", "link-a", "link-a", "no-such-link"])
    expected = {
        link: sum(b.length - b.used for b in _scan(ctx, link)) for link in ("link-a", "link-b")
    }
    assert free == {**expected, "no-such-link": 0}
    assert 0 < free["link-a"] < 4096 + 100 + 5000 + 64


def test_ingest_in_slices_stores_every_block_in_order_in_one_entry(net, monkeypatch) -> None:
    monkeypatch.setattr(ingest, "INSERT_SLICE_BLOCKS", 2)
    ctx = net.relay.ctx
    now = datetime.now(UTC)
    blocks = [BlockIn(str(uuid.uuid4()), os.urandom(64 + i), 0.02, 1e-10, now) for i in range(5)]
    # One duplicate inside the request: stored once, counted as a duplicate.
    result = ingest.ingest(
        ctx, "link-a", [*blocks, blocks[2]], actor="test-module", actor_link="link-a"
    )
    assert (result.accepted, result.duplicates) == (5, 1)
    assert result.accepted_bits == 8 * sum(len(b.key) for b in blocks)
    with ctx.db.read() as s:
        rows = s.execute(
            select(LinkBlock).where(LinkBlock.link_id == "link-a").order_by(LinkBlock.seq)
        ).scalars()
        stored = [(r.block_id, r.length) for r in rows]
        entries = [
            json.loads(e.entry)
            for e in s.execute(
                select(LedgerEntry).where(LedgerEntry.event == "link_key.ingested")
            ).scalars()
        ]
    assert stored == [(b.block_id, len(b.key)) for b in blocks]
    (entry,) = [e for e in entries if e["link"] == "link-a"]
    assert entry["blocks"] == 5
    assert entry["block_ids"] == [b.block_id for b in blocks]
    # The stored bytes are the pushed bytes (taken through the relay's own path).
    with ctx.db.write() as s:
        avail = consume.available(s, "link-a", 2**62)
        key, _ = consume.take(
            s, ctx.keyring, "link-a", [Range(a.buffer_id, 0, a.length) for a in avail]
        )
    assert key == b"".join(b.key for b in blocks)


def test_conflict_in_a_later_slice_stores_nothing(net, monkeypatch) -> None:
    monkeypatch.setattr(ingest, "INSERT_SLICE_BLOCKS", 2)
    ctx = net.relay.ctx
    now = datetime.now(UTC)
    first = BlockIn(str(uuid.uuid4()), os.urandom(64), 0.02, 1e-10, now)
    ingest.ingest(ctx, "link-a", [first], actor="test-module", actor_link="link-a")
    fresh = [BlockIn(str(uuid.uuid4()), os.urandom(64), 0.02, 1e-10, now) for _ in range(4)]
    changed = BlockIn(first.block_id, os.urandom(64), 0.02, 1e-10, now)
    with pytest.raises(BlockConflict):
        ingest.ingest(ctx, "link-a", [*fresh, changed], actor="test-module", actor_link="link-a")
    with ctx.db.read() as s:
        ids = list(
            s.execute(select(LinkBlock.block_id).where(LinkBlock.link_id == "link-a")).scalars()
        )
    assert ids == [first.block_id]
