"""Outbox delivery: in order per destination, prompt and batched.

* Two worker processes of one node deliver in order: see
  tests/e2e/test_outbox_order_processes.py.
* The claim itself: two claimers released together get one destination's messages
  once, in one piece, never both.
* Wake on commit: with `[outbox] idle_seconds = 60`, a committed message still leaves
  within a fraction of a second.
* The receiver's batch route, with real relay messages (``relaynet``): in order, stops
  at the first message not applied, continues past applied ones, refuses a bad batch
  whole without changing anything, and admits peers only.
"""

from __future__ import annotations

import threading
import time
from datetime import UTC, datetime, timedelta
from typing import Any

import pytest
from sqlalchemy import select

import relaynet
from helpers import snapshot
from keystrata.loopback.pki import PkiFiles
from keystrata.peering import outbox
from keystrata.peering.messages import MAX_BATCH
from keystrata.relay import operation
from keystrata.storage.db import Database
from keystrata.storage.models import OutboxMessage
from peerstub import PeerStub, enqueue_seqs, peers_of


def _wait(what: str, check: Any, timeout: float = 60) -> None:
    deadline = time.monotonic() + timeout
    while not check():
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        time.sleep(0.05)


def test_two_claimers_at_once_never_share_a_destination(db_url: str) -> None:
    db = Database.from_url(db_url)
    try:
        enqueue_seqs(db, "station-b", range(0, 60))
        enqueue_seqs(db, "relay-1", range(0, 3))
        for round_ in range(10):
            start = threading.Barrier(2)
            got: dict[str, list[outbox.Pending]] = {}

            def claim(
                holder: str,
                start: threading.Barrier = start,
                got: dict[str, list[outbox.Pending]] = got,
            ) -> None:
                start.wait()
                got[holder] = outbox.claim_next(
                    db,
                    "station-b",
                    holder=holder,
                    now=datetime.now(UTC),
                    limit=8,
                    max_bytes=1 << 20,
                )

            threads = [threading.Thread(target=claim, args=(h,)) for h in ("w1", "w2")]
            for t in threads:
                t.start()
            for t in threads:
                t.join(30)
            winners = [h for h, run in got.items() if run]
            assert len(winners) == 1, (round_, {h: len(r) for h, r in got.items()})
            run = got[winners[0]]
            seqs = [m.body["seq"] for m in run]
            assert seqs == list(range(4 * round_, 4 * round_ + 8)), seqs
            # While the winner holds the lease nobody else gets this destination, but
            # another destination is free.
            loser = "w2" if winners[0] == "w1" else "w1"
            later = datetime.now(UTC)
            assert not outbox.claim_next(
                db, "station-b", holder=loser, now=later, limit=8, max_bytes=1 << 20
            )
            other = outbox.claim_next(
                db, "relay-1", holder=loser, now=later, limit=8, max_bytes=1 << 20
            )
            assert [m.body["seq"] for m in other] == [0, 1, 2]
            outbox.settle(
                db,
                other,
                holder=loser,
                now=later,
                acknowledged=0,
                error=None,
                max_backoff=timedelta(seconds=30),
            )
            # Four acknowledged, the fifth refused: it and everything after it wait.
            outbox.settle(
                db,
                run,
                holder=winners[0],
                now=later,
                acknowledged=4,
                error="409: not yet",
                max_backoff=timedelta(seconds=30),
            )
            assert "station-b" not in outbox.due_destinations(db, now=later)
            assert "station-b" in outbox.due_destinations(db, now=later + timedelta(seconds=1))
            with db.read() as s:
                head = s.execute(
                    select(OutboxMessage)
                    .where(OutboxMessage.destination == "station-b")
                    .order_by(OutboxMessage.id)
                    .limit(1)
                ).scalar_one()
            assert (head.attempts, head.last_error) == (1, "409: not yet")
            _make_due(db)
    finally:
        db.dispose()


def _make_due(db: Database) -> None:
    from sqlalchemy import update

    with db.write() as s:
        s.execute(update(OutboxMessage).values(due_at=datetime.now(UTC) - timedelta(seconds=1)))


def test_claim_honours_the_byte_cap_and_a_backing_off_head(db_url: str) -> None:
    db = Database.from_url(db_url)
    try:
        enqueue_seqs(db, "station-b", range(0, 5))
        now = datetime.now(UTC)
        size = len(b'{"kind":"test.seq","seq":0}')
        run = outbox.claim_next(db, "station-b", holder="w", now=now, limit=64, max_bytes=2 * size)
        assert [m.body["seq"] for m in run] == [0, 1]
        outbox.settle(
            db,
            run,
            holder="w",
            now=now,
            acknowledged=0,
            error="503: later",
            max_backoff=timedelta(seconds=30),
        )
        # The head backs off, so nothing of that destination goes, whatever its age.
        assert not outbox.claim_next(
            db, "station-b", holder="w", now=now, limit=64, max_bytes=1 << 20
        )
        later = now + timedelta(seconds=1)
        run = outbox.claim_next(db, "station-b", holder="w", now=later, limit=64, max_bytes=1 << 20)
        assert [m.body["seq"] for m in run] == [0, 1, 2, 3, 4]
    finally:
        db.dispose()


def test_a_commit_that_enqueues_wakes_the_outbox_loop(
    make_node, db_url: str, pki: PkiFiles
) -> None:
    from keystrata.node.loops import Background
    from keystrata.peering.client import PeerClient

    stub = PeerStub(pki, "station-b")
    # Polling alone would take a minute; the loop must wake on the commit.
    extra = peers_of({"station-b": stub}) + "\n[outbox]\nidle_seconds = 60\n"
    node = make_node("station-a", "station", db_url=db_url, extra=extra)
    peers = PeerClient(node.ctx.settings)
    background = Background(node.ctx, peers)
    background.start()
    try:
        time.sleep(0.5)  # the loop found nothing and waits
        with pytest.raises(RuntimeError), node.ctx.db.write() as s:
            outbox.enqueue(
                s,
                destination="station-b",
                kind="test.seq",
                segment_id=None,
                body={"seq": 0},
                now=datetime.now(UTC),
            )
            raise RuntimeError("rolled back")
        for seq in range(3):
            committed = time.monotonic()
            enqueue_seqs(node.ctx.db, "station-b", range(seq, seq + 1))
            _wait("the message at the peer", lambda s=seq: stub.count() == s + 1, timeout=5)
            assert stub.record.applied_at[seq] - committed < 2.0
            time.sleep(0.3)  # idle again
        assert stub.record.applied == [0, 1, 2]  # the rolled-back one never went
    finally:
        background.stop()
        peers.close()
        stub.close()


def test_a_refused_head_backs_off_visibly_and_holds_back_the_rest(
    make_node, db_url: str, pki: PkiFiles
) -> None:
    from keystrata.observability.metrics import collect
    from keystrata.peering.client import PeerClient
    from keystrata.peering.sender import deliver_once

    stub = PeerStub(pki, "station-b", refuse_once={3})
    node = make_node("station-a", "station", db_url=db_url, extra=peers_of({"station-b": stub}))
    peers = PeerClient(node.ctx.settings)
    try:
        enqueue_seqs(node.ctx.db, "station-b", range(0, 6))
        assert deliver_once(node.ctx, peers) == 3  # 0, 1, 2; 3 refused, 4 and 5 wait
        assert deliver_once(node.ctx, peers) == 0  # 3 backs off
        # What an operator sees: the head's refusals in the metrics, its error in the row.
        (family,) = [f for f in collect(node.ctx) if f.name == "keystrata_outbox_head_refusals"]
        assert [(x.labels, x.value) for x in family.samples] == [({"destination": "station-b"}, 1)]
        with node.ctx.db.read() as s:
            head = s.execute(select(OutboxMessage).order_by(OutboxMessage.id).limit(1)).scalar_one()
        assert head.body == b'{"kind":"test.seq","seq":3}'
        assert head.last_error == "409: not yet: refused once"
        time.sleep(0.3)
        assert deliver_once(node.ctx, peers) == 3
        assert stub.record.applied == list(range(6))
        assert stub.record.out_of_order == 0 and stub.record.batch_requests > 0
    finally:
        peers.close()
        stub.close()


# ---------------------------------------------------------------- the batch route


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    net = relaynet.build(make_node, db_factory)
    relaynet.provision_saes(net)
    return net


def _to_station_a(net: relaynet.RelayNet) -> list[dict[str, Any]]:
    """Two segments made by the relay: its two messages to station-a, in order (their
    link-a ranges follow each other)."""
    net.feed("station-a", 4)
    net.feed("station-b", 4)
    for _ in range(2):
        operation.make_segment(net.relay.ctx, relaynet.PAIR, 2048, owner="station-a")
    bodies = [m.body for s, m in net.pending() if s == "relay-1" and m.destination == "station-a"]
    assert len(bodies) == 2
    return bodies


def test_batch_route_applies_in_order_and_stops_at_the_first_refusal(net, api) -> None:
    first, second = _to_station_a(net)
    peer = api(net.a)("relay-1")
    before = snapshot(net.a.ctx)
    r = peer.post("/api/v1/peer/messages/batch", json={"messages": [second, first]})
    assert r.status_code == 200, r.text
    (only,) = r.json()["results"]  # stopped at the refusal: `first` was not attempted
    assert only["status"] == 409 and only["message"].startswith("not yet")
    assert snapshot(net.a.ctx) == before
    r = peer.post("/api/v1/peer/messages/batch", json={"messages": [first, second]})
    assert [(x["status"], x["outcome"]) for x in r.json()["results"]] == [(200, "applied")] * 2
    assert [x["segment_id"] for x in r.json()["results"]] == [
        first["segment_id"],
        second["segment_id"],
    ]
    # Resent (a lost reply): already applied, and the run continues past them.
    r = peer.post("/api/v1/peer/messages/batch", json={"messages": [first, second]})
    assert [(x["status"], x["outcome"]) for x in r.json()["results"]] == [(200, "already")] * 2


def test_batch_route_refuses_a_bad_batch_whole(net, api) -> None:
    first, second = _to_station_a(net)
    peer = api(net.a)("relay-1")
    before = snapshot(net.a.ctx)
    bad: list[Any] = [
        {"messages": [first, {"kind": "no.such"}]},  # a kind a station does not take
        {"messages": [first, second, "x"]},
        {"messages": []},
        {"messages": [first] * (MAX_BATCH + 1)},
        {"messages": first},
        {"messages": [first], "more": 1},
        [first, second],
    ]
    for body in bad:
        r = peer.post("/api/v1/peer/messages/batch", json=body)
        assert r.status_code == 400, (str(body)[:80], r.status_code, r.text)
        assert set(r.json()) <= {"message", "details"}
        assert snapshot(net.a.ctx) == before
    r = peer.post(
        "/api/v1/peer/messages/batch",
        content=b"{not json",
        headers={"content-type": "application/json"},
    )
    assert r.status_code == 400 and snapshot(net.a.ctx) == before
    # A malformed member makes the message one this node does not take: every message
    # is parsed before any is applied, so the batch is refused whole and names it.
    broken = {**second, "header": "%%% not Base64"}
    r = peer.post("/api/v1/peer/messages/batch", json={"messages": [first, broken, second]})
    assert r.status_code == 400 and r.json()["message"].startswith("messages[1]: ")
    assert "header" in r.json()["message"] and "%%%" not in r.text
    assert snapshot(net.a.ctx) == before


def test_batch_route_admits_peers_only(net, api) -> None:
    first, _ = _to_station_a(net)
    before = snapshot(net.a.ctx)
    body = {"messages": [first]}
    for cert, status in (("sae-a1", 403), ("ops-ada", 403), (None, 401)):
        r = api(net.a)(cert).post("/api/v1/peer/messages/batch", json=body)
        assert r.status_code == status, (cert, r.text)
    # Refusals go to the ledger; nothing else changes.
    after = snapshot(net.a.ctx)
    assert after["pair_segment"] == before["pair_segment"]
    assert after["link_block"] == before["link_block"]
