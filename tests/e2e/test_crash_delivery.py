"""Crash tests of key delivery on real processes: encryptor pairs rekey continuously
(master Get key at one station, slave Get key with key IDs at the other, through
`keystrata_client.keys`) while the stations and the relay are SIGKILLed and restarted.
Then, from what the clients saw and from each node's ledger (auditor API):

* every key both ends received is the same key (SHA-256 digests compared);
* no key ID reached a slave twice; asking again is 401;
* every key a master received is in a `key.allocated` entry of its station's ledger,
  every key a slave received in a `key.delivered` entry of the slave's station;
* each ledger's RFC 9162 Merkle root (recomputed here from the entries) matches the
  node's latest signed checkpoint, and earlier checkpoints match their prefixes;
* clients saw only 200, 401 for a key ID already served, 503, or a connection error
  while a node was down: never a 500, never a wait past the client timeout.

`make test` runs KEYSTRATA_KILLS=4 (the default here) on PostgreSQL; `make faults` a long
series on both backends.
"""

from __future__ import annotations

import os
import random
import threading
import time

import pytest

from e2enet import STOPPED, UNBOUNDED, add_auditor, settled, stocked, wait_for
from keystrata.loopback.network import NETWORK, feed_links, set_policy, start_network
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, stop_all
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

KILLS = int(os.environ.get("KEYSTRATA_KILLS", "4"))


def _network(tmp_path, pki: PkiFiles, db_factory) -> dict[str, NodeProcess]:
    nodes = start_network(
        tmp_path,
        pki,
        {n: db_factory() for n in NETWORK},
        extra=SETTINGS,
        policy=UNBOUNDED,
        saes=True,
    )
    add_auditor(nodes, pki)
    return nodes


@pytest.mark.timeout(120 + 15 * KILLS)  # a restart takes seconds on a busy machine
# `make test` runs this series on PostgreSQL (the stations' backend with several workers)
# and test_crash.py's on SQLite; `make faults` runs both series on both backends.
@pytest.mark.parametrize(
    "db_factory", [pytest.param("sqlite", marks=pytest.mark.slow), "postgresql"], indirect=True
)
def test_sigkill_during_key_delivery(tmp_path, pki, db_factory) -> None:
    rng = random.Random(20261215)
    nodes = _network(tmp_path, pki, db_factory)
    seen, stop = Seen(), threading.Event()
    urls = {n: node.url for n, node in nodes.items()}
    workers = [
        threading.Thread(target=rekeying, args=(pki, urls, pair, seen, stop), daemon=True)
        for pair in PAIRS
    ]
    try:
        feed_links(nodes, pki, 80)
        wait_for("ready key at the stations", lambda: stocked(nodes, pki, 16), every=0.2)
        for w in workers:
            w.start()
        killed = []
        first = list(NETWORK)  # every node dies at least once when KILLS >= 3
        rng.shuffle(first)
        for i in range(KILLS):
            time.sleep(rng.uniform(0.5, 2.0))
            victim = nodes[first[i] if i < len(first) else rng.choice(list(NETWORK))]
            victim.kill()
            killed.append(victim.node_id)
            time.sleep(rng.uniform(0.0, 0.5))
            victim.start(pki)
        time.sleep(1.0)  # some rekeys with every node back
        stop.set()
        for w in workers:
            w.join(PATIENCE + 2 * TIMEOUT)
            assert not w.is_alive(), "an encryptor pair hung"
        set_policy(nodes, pki, STOPPED)
        wait_for("segments settled after the kills", lambda: settled(nodes, pki))
        ledgers = {n: checked_ledger(node.url, pki) for n, node in nodes.items()}
    finally:
        stop.set()
        stop_all(list(nodes.values()))
    assert len(killed) == KILLS
    assert seen.problems == [], (seen.problems[:10], seen.outcomes)
    assert seen.longest_call < TIMEOUT + 1, seen.longest_call
    assert seen.outcomes["dec_keys:200"] >= 4, seen.outcomes  # the pairs did rekey
    if {"station-a", "station-b"} & set(killed):  # the kills reached the clients
        assert any(k.endswith(("unsent", "lost-answer")) for k in seen.outcomes), seen.outcomes
    ends_agree(seen)
    ledgers_account_for_every_key(seen, ledgers)
