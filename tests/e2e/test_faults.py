"""Fault tests on real processes while encryptor pairs rekey (the machinery of
test_crash_delivery.py): the database server crashes and comes back; a station is
unreachable for its peers for a while and comes back. After each:

* failures were answered (503 with the standard's error object, or no connection while a
  node was down), never a 500 and never a wait past the client timeout;
* both ends of every key hold the same key, none was served twice, and every key a
  client received is in its station's ledger; each ledger matches its signed checkpoints;
* the relay holds no pair key and both ends of each QKD link consumed the same bytes
  (invariants 1 and 2 of the design notes);
* the backlog drains: no outbox message is left at any node.

The nodes use a private PostgreSQL server (tests/pgcluster.py) so it can be crashed
without touching the machine's shared one.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

import pgcluster
from e2enet import (
    STOPPED,
    UNBOUNDED,
    add_auditor,
    both_ends_consumed_alike,
    relay_holds_no_pair_key,
    settled,
    stocked,
    wait_for,
)
from keystrata.loopback.network import NETWORK, feed_links, set_policy, start_network
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, stop_all
from keystrata_client import ApiError, OperatorClient
from keystrata_client.keys import KeyClient
from rekeying import (
    PAIRS,
    PATIENCE,
    SETTINGS,
    TIMEOUT,
    Seen,
    checked_ledger,
    ends_agree,
    ledgers_account_for_every_key,
    rekeying,
)

pytestmark = [
    pytest.mark.slow,  # about two minutes: `make faults` runs it
    pytest.mark.skipif(not pgcluster.available(), reason="PostgreSQL binaries not installed"),
]


@pytest.fixture
def private_pg() -> Iterator[pgcluster.PgCluster]:
    with pgcluster.private_postgres() as pg:
        yield pg


def _network(tmp_path: Path, pki: PkiFiles, pg: pgcluster.PgCluster) -> dict[str, NodeProcess]:
    urls = {n: pg.create_database(n.replace("-", "_")) for n in NETWORK}
    nodes = start_network(
        tmp_path,
        pki,
        urls,
        extra=SETTINGS,  # outbox retries back off to 1 s at most
        policy=UNBOUNDED,
        saes=True,
    )
    add_auditor(nodes, pki)
    return nodes


def _outbox_backlog(node: NodeProcess, pki: PkiFiles) -> float:
    """Messages waiting in the node's outbox, read from its Prometheus metrics."""
    with OperatorClient(node.url, pki.identity("ops-ada")) as ops:
        text = ops._client.get(node.url + "/api/v1/metrics").text
    for family in text_string_to_metric_families(text):  # the reference parser
        if family.name == "keystrata_outbox_pending_messages":
            return sum(s.value for s in family.samples)
    return 0.0


def _under_load(
    tmp_path: Path,
    pki: PkiFiles,
    pg: pgcluster.PgCluster,
    seen: Seen,
    fault: Callable[[dict[str, NodeProcess]], None],
) -> None:
    """Start the network, rekey, run ``fault(nodes)``, rekey on, then check everything
    once the network settled; ``seen`` collects what the clients saw."""
    nodes = _network(tmp_path, pki, pg)
    stop = threading.Event()
    urls = {n: node.url for n, node in nodes.items()}
    workers = [
        threading.Thread(target=rekeying, args=(pki, urls, pair, seen, stop), daemon=True)
        for pair in PAIRS
    ]
    try:
        feed_links(nodes, pki, 60)
        wait_for("ready key at the stations", lambda: stocked(nodes, pki, 16), every=0.3)
        for w in workers:
            w.start()
        time.sleep(1.5)
        fault(nodes)
        time.sleep(3.0)  # rekeying goes on with everything back
        stop.set()
        for w in workers:
            w.join(PATIENCE + 2 * TIMEOUT)
            assert not w.is_alive(), "an encryptor pair hung"
        set_policy(nodes, pki, STOPPED)
        wait_for(
            "the backlog drained",
            lambda: (
                settled(nodes, pki) and not any(_outbox_backlog(n, pki) for n in nodes.values())
            ),
            every=0.5,
        )
        ledgers = {n: checked_ledger(node.url, pki) for n, node in nodes.items()}
    finally:
        stop.set()
        stop_all(list(nodes.values()))
    assert seen.problems == [], (seen.problems[:10], seen.outcomes)
    assert seen.longest_call < TIMEOUT + 1, seen.longest_call
    ends_agree(seen)
    ledgers_account_for_every_key(seen, ledgers)
    configs = {n: node.config for n, node in nodes.items()}
    both_ends_consumed_alike(configs)
    relay_holds_no_pair_key(configs["relay-1"])


def test_database_crash_under_load(tmp_path, pki, private_pg) -> None:
    served_during: dict[str, int] = {}

    def crash_database(nodes: dict[str, NodeProcess]) -> None:
        private_pg.stop("immediate")  # a crash: open transactions are cut off
        with KeyClient(nodes["station-a"].url, pki.identity("sae-a1"), timeout=TIMEOUT) as kme:
            start = time.monotonic()
            try:
                kme.status("sae-b1")
                served_during["status"] = 200
            except ApiError as exc:
                served_during["status"] = exc.status
                served_during["message"] = exc.message
            served_during["seconds"] = int(time.monotonic() - start)
        time.sleep(4.0)
        private_pg.start()
        private_pg.wait_ready()

    seen = Seen()
    _under_load(tmp_path, pki, private_pg, seen, crash_database)
    # With the database gone a node answers at once, 503 with the error object.
    assert served_during["status"] == 503, served_during
    assert served_during["seconds"] < TIMEOUT
    assert seen.outcomes["enc_keys:503"] + seen.outcomes["dec_keys:503"] > 0, seen.outcomes
    assert seen.outcomes["dec_keys:200"] >= 4, seen.outcomes  # rekeying resumed


def test_station_unreachable_then_back(tmp_path, pki, private_pg) -> None:
    seen, served_meanwhile = Seen(), []

    def away(nodes: dict[str, NodeProcess]) -> None:
        # station-b is gone for longer than several outbox retries; its peers queue.
        before = seen.outcomes["enc_keys:200"]
        nodes["station-b"].stop()
        time.sleep(6.0)
        served_meanwhile.append(seen.outcomes["enc_keys:200"] - before)
        nodes["station-b"].start(pki)

    _under_load(tmp_path, pki, private_pg, seen, away)
    # Masters at station-a kept getting keys while station-b was away (the allocation
    # messages waited in the outbox); the slaves at station-b fetched them afterwards,
    # which _under_load checked key by key.
    assert served_meanwhile[0] > 0, seen.outcomes
    assert seen.outcomes["dec_keys:200"] >= 4, seen.outcomes
