"""Outbox delivery in order per destination, by two worker processes of one node
(`keystrata serve` with `[server] workers = 2`, SQLite and PostgreSQL): a backlog and a
stream of new messages reach two peers over mutual TLS. The peers (``peerstub.py``)
apply only the next message in line, as a station applies link ranges; any overtaking
shows as a "not yet" refusal. Before this change both workers claimed the same
destination's messages at once (`SKIP LOCKED`) and kept sending after a refusal, so
most messages were refused at least once."""

from __future__ import annotations

import time
from collections.abc import Iterator

import pytest
from sqlalchemy import func, select

from e2enet import wait_for
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import prepare_node
from keystrata.storage.db import Database
from keystrata.storage.models import Lease, OutboxMessage
from peerstub import PeerStub, enqueue_seqs, peers_of


@pytest.fixture
def stubs(pki: PkiFiles) -> Iterator[dict[str, PeerStub]]:
    # Refused once: what arrives before what it depends on (another node's message).
    made = {
        "station-b": PeerStub(pki, "station-b", refuse_once={5, 77, 150, 151, 299}),
        "relay-1": PeerStub(pki, "relay-1", refuse_once={0, 64, 200}),
    }
    yield made
    for stub in made.values():
        stub.close()


def test_two_worker_processes_deliver_each_destination_in_order(
    tmp_path, pki: PkiFiles, db_url: str, stubs: dict[str, PeerStub]
) -> None:
    n = 300
    node = prepare_node(tmp_path, pki, "station-a", "station", db_url, extra=peers_of(stubs))
    config = node.config.read_text()
    node.config.write_text(config.replace("[server]\n", "[server]\nworkers = 2\n", 1))
    db = Database.from_url(db_url)
    try:
        # A backlog both workers find at start, then a stream while they run.
        for dest in stubs:
            enqueue_seqs(db, dest, range(0, n // 2))
        node.start(pki)
        for start in range(n // 2, n, 10):
            for dest in stubs:
                enqueue_seqs(db, dest, range(start, start + 10))
            time.sleep(0.02)
        wait_for(
            "every message applied", lambda: all(s.count() == n for s in stubs.values()), every=0.05
        )
        for dest, stub in stubs.items():
            r = stub.record
            assert r.applied == list(range(n)), dest
            assert r.out_of_order == 0, (dest, r.out_of_order)  # nothing overtook
            assert r.duplicates == 0, dest
            assert r.refused == stub.refuse_once, dest  # each refusal was sent again
            assert r.client_subjects == {"station-a"}  # the node's own certificate
            assert r.requests <= n // 3, (dest, r.requests)  # several messages per request
            assert r.batch_requests > 0, dest
        wait_for("outbox empty", lambda: _rows(db) == 0, timeout=10, every=0.05)
        with db.read() as s:  # every destination lease given back
            # (the restore check keeps its own lease, `restore-check`, while it runs)
            outbox_leases = select(func.count()).where(Lease.name.like("outbox#%"))
            assert s.execute(outbox_leases).scalar_one() == 0
    finally:
        node.stop()
        db.dispose()


def _rows(db: Database) -> int:
    with db.read() as s:
        return int(s.execute(select(func.count()).select_from(OutboxMessage)).scalar_one())
