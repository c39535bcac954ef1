"""Group commit: concurrent requests served by one transaction still get their own
results, refusals and ledger entries, and never share key.

The batching is made deterministic by holding the lane's leader lock while the requests
queue up; releasing it lets one leader serve them all in one transaction."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable, Sequence
from typing import Any

import pytest
from sqlalchemy import select

import relaynet
from keystrata.delivery import dec_keys, enc_keys
from keystrata.delivery.group_commit import GroupCommit
from keystrata.delivery.schemas import KeyRequest
from keystrata.errors import NotEnoughKey, QuotaReached, Unauthenticated
from keystrata.registry.principals import Caller
from keystrata.registry.specs import PrincipalRole
from keystrata.storage.models import LedgerEntry

A1 = Caller(principal_id="sae-a1", role=PrincipalRole.SAE, station_id="station-a")
B1 = Caller(principal_id="sae-b1", role=PrincipalRole.SAE, station_id="station-b")


def _together(lane: GroupCommit[Any, Any], calls: list[Callable[[], Any]]) -> list[Any]:
    """Run ``calls`` on threads while the lane is busy, so that one batch serves them
    all, queued in the order given; return each call's result or exception."""
    out: list[Any] = [None] * len(calls)

    def run(i: int) -> None:
        try:
            out[i] = calls[i]()
        except Exception as exc:
            out[i] = exc

    threads = [threading.Thread(target=run, args=(i,)) for i in range(len(calls))]
    with lane._leader:
        for n, t in enumerate(threads, start=1):
            t.start()
            deadline = time.monotonic() + 30
            while len(lane._queue) < n:
                assert time.monotonic() < deadline, "the requests did not queue"
                time.sleep(0.005)
    for t in threads:
        t.join(30)
    return out


def test_each_request_gets_its_own_result() -> None:
    batches: list[list[int]] = []

    def run(items: Sequence[int]) -> list[int | BaseException]:
        batches.append(list(items))
        return [ValueError(f"odd {i}") if i % 2 else i * 10 for i in items]

    lane: GroupCommit[int, int] = GroupCommit(run)
    out = _together(lane, [lambda i=i: lane.submit(i) for i in range(8)])
    assert batches and len(batches) == 1 and sorted(batches[0]) == list(range(8))
    for i, got in enumerate(out):
        if i % 2:
            assert isinstance(got, ValueError) and str(got) == f"odd {i}"
        else:
            assert got == i * 10


def test_a_failed_transaction_fails_every_request_of_it_and_no_other() -> None:
    def run(items: Sequence[int]) -> list[int | BaseException]:
        if 3 in items:
            raise RuntimeError("database went away")
        return list(items)

    lane: GroupCommit[int, int] = GroupCommit(run, max_batch=4)
    out = _together(lane, [lambda i=i: lane.submit(i) for i in range(4)])
    assert all(isinstance(x, RuntimeError) for x in out)
    assert lane.submit(5) == 5  # the lane is usable afterwards


def test_batches_are_capped() -> None:
    sizes: list[int] = []

    def run(items: Sequence[int]) -> list[int | BaseException]:
        sizes.append(len(items))
        return list(items)

    lane: GroupCommit[int, int] = GroupCommit(run, max_batch=3)
    out = _together(lane, [lambda i=i: lane.submit(i) for i in range(7)])
    assert out == list(range(7))
    assert max(sizes) <= 3 and sum(sizes) == 7


def test_no_load_means_no_waiting() -> None:
    lane: GroupCommit[int, int] = GroupCommit(lambda items: [i + 1 for i in items])
    assert [lane.submit(i) for i in range(3)] == [1, 2, 3]


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    # Station A owns three 512-byte segments (1536 bytes = 48 keys of 256 bits); the
    # quota lets A deliver 40 such keys a day.
    net = relaynet.build(make_node, db_factory, policy={"daily_quota_bits": 40 * 256})
    relaynet.provision_saes(net)
    relaynet.ready_key(net, segments=6, size=512)
    return net


def _lane(ctx: Any, name: str) -> GroupCommit[Any, Any]:
    lane = ctx.process_state.get(name)
    if lane is None:  # created on first use: make one request to create it
        raise AssertionError(f"no lane {name}")
    return lane


def _entries(ctx: Any, event: str) -> list[dict[str, Any]]:
    with ctx.db.read() as s:
        rows = s.execute(
            select(LedgerEntry.entry).where(LedgerEntry.event == event).order_by(LedgerEntry.idx)
        ).scalars()
        return [json.loads(r) for r in rows]


def test_one_batch_of_get_key_with_mixed_outcomes(net) -> None:
    ctx = net.a.ctx
    enc_keys.get_keys(ctx, A1, "sae-b1", KeyRequest(number=1))  # creates the lane
    lane = _lane(ctx, "get_key")
    # 1 key delivered so far. In one batch: 20 + 15 keys fit the quota (36 <= 40),
    # the next 10 would exceed it, then 4 more fit (40).
    sizes = [20, 15, 10, 4]
    calls = [lambda n=n: enc_keys.get_keys(ctx, A1, "sae-b1", KeyRequest(number=n)) for n in sizes]
    out = _together(lane, calls)
    by_size = dict(zip(sizes, out, strict=True))
    assert isinstance(by_size[10], QuotaReached), by_size[10]
    delivered = [k for n in (20, 15, 4) for k in by_size[n]]
    assert [len(by_size[n]) for n in (20, 15, 4)] == [20, 15, 4]
    assert len({k.key for k in delivered}) == len(delivered) == 39  # no shared key
    # One ledger entry per delivered request, each naming its own keys.
    allocated = _entries(ctx, "key.allocated")
    assert len(allocated) == 4
    named = [set(e["key_ids"]) for e in allocated[1:]]
    assert sorted(map(len, named)) == [4, 15, 20]
    assert set().union(*named) == {k.key_id for k in delivered}
    # The slave's station gets the same keys from one combined message.
    net.drain()
    got = dec_keys.get_keys_with_ids(net.b.ctx, B1, "sae-a1", [k.key_id for k in delivered])
    assert {k.key_id: k.key for k in got} == {k.key_id: k.key for k in delivered}


def test_one_batch_of_get_key_with_key_ids_serves_each_key_once(net) -> None:
    keys = enc_keys.get_keys(net.a.ctx, A1, "sae-b1", KeyRequest(number=3))
    net.drain()
    ctx = net.b.ctx
    first = dec_keys.get_keys_with_ids(ctx, B1, "sae-a1", [keys[0].key_id])
    assert first[0].key == keys[0].key
    lane = _lane(ctx, "get_key_with_ids")
    ids = [k.key_id for k in keys]
    # The same slave asks for key 2 twice and for keys 1+3 (1 already fetched).
    calls = [
        lambda: dec_keys.get_keys_with_ids(ctx, B1, "sae-a1", [ids[1]]),
        lambda: dec_keys.get_keys_with_ids(ctx, B1, "sae-a1", [ids[1]]),
        lambda: dec_keys.get_keys_with_ids(ctx, B1, "sae-a1", [ids[0], ids[2]]),
        lambda: dec_keys.get_keys_with_ids(ctx, B1, "sae-a1", [ids[2]]),
    ]
    out = _together(lane, calls)
    served = [x for x in out if isinstance(x, list)]
    refused = [x for x in out if isinstance(x, Unauthenticated)]
    assert len(served) == 2 and len(refused) == 2, out
    assert sorted(k.key for x in served for k in x) == sorted([keys[1].key, keys[2].key])
    # A refused request took nothing: key 3 went whole to one request.
    events = [e["event"] for e in _entries(ctx, "key.delivered")]
    assert len(events) == 3
    reasons = [e["reason"] for e in _entries(ctx, "key.refused")]
    assert reasons == ["already_delivered"] * 2  # replays, as the ledger tells an auditor


def test_a_batch_of_allocation_messages_applies_in_order_in_one_run(net) -> None:
    from keystrata.node import dispatch
    from keystrata.peering import outbox

    for _ in range(3):  # one request at a time: three key.allocated messages
        enc_keys.get_keys(net.a.ctx, A1, "sae-b1", KeyRequest(number=2))
    bodies = outbox.pending_bodies(net.a.ctx.db, destination="station-b", kind="key.allocated")
    assert len(bodies) == 3
    ctx = net.b.ctx
    before = len(_entries(ctx, "key.allocated"))
    # Out of order: the second message names bytes after the first's, not yet here.
    answers = dispatch.handle_batch(ctx, "station-a", [bodies[1], bodies[0]])
    assert [a.status for a in answers] == [409]
    assert len(_entries(ctx, "key.allocated")) == before  # nothing applied
    answers = dispatch.handle_batch(ctx, "station-a", bodies)
    assert [(a.status, a.outcome) for a in answers] == [(200, "applied")] * 3
    assert len(_entries(ctx, "key.allocated")) == before + 3  # one entry per message
    answers = dispatch.handle_batch(ctx, "station-a", bodies)  # a resend
    assert [(a.status, a.outcome) for a in answers] == [(200, "already")] * 3
    # A message from a station that is not the pair's other station stops the run.
    answers = dispatch.handle_batch(ctx, "station-c", bodies[:1])
    assert [a.status for a in answers] == [403]


def test_two_worker_processes_never_take_the_same_bytes(net) -> None:
    """Two contexts on one station database (as two worker processes have: their own
    engine, lanes and write gate) take Get keys from the same front of owned segments at
    once: every byte goes to one key at most (PostgreSQL: row locks and the re-check in
    ``OwnedStock.reserve``; SQLite: its single writer)."""
    from itertools import pairwise

    from keystrata.node.lifecycle import open_node
    from keystrata.storage.db import Database
    from keystrata.storage.models import KeyAlloc

    second = Database.from_url(net.a.settings.database.url, sqlite_synchronous="NORMAL")
    try:
        contexts = [net.a.ctx, open_node(net.a.settings, second)]
        errors: list[BaseException] = []
        got: list[enc_keys.DeliveredKey] = []
        lock = threading.Lock()
        barrier = threading.Barrier(12)

        def master(i: int) -> None:
            ctx = contexts[i % 2]
            barrier.wait()
            while True:
                try:
                    keys = enc_keys.get_keys(ctx, A1, "sae-b1", KeyRequest(number=1 + i % 3))
                except NotEnoughKey:
                    return
                except QuotaReached:
                    return
                except BaseException as exc:
                    with lock:
                        errors.append(exc)
                    return
                with lock:
                    got.extend(keys)

        threads = [threading.Thread(target=master, args=(i,)) for i in range(12)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(60)
        assert not errors, errors
        assert got
        assert len({k.key for k in got}) == len(got)
        with net.a.ctx.db.read() as s:
            rows = s.execute(select(KeyAlloc.ranges)).scalars().all()
        spans: dict[str, list[tuple[int, int]]] = {}
        for ranges in rows:
            for r in json.loads(ranges):
                spans.setdefault(r["segment"], []).append((r["offset"], r["offset"] + r["length"]))
        for segment, ss in spans.items():
            ss.sort()
            for (_, end), (start, _) in pairwise(ss):
                assert start >= end, f"two keys share bytes of segment {segment}"
        assert sum(e - b for ss in spans.values() for b, e in ss) == 32 * len(got)
    finally:
        second.dispose()
