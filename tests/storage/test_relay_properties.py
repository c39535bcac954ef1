"""Property test (hypothesis): random sequences of relay operations, message deliveries
(in any order, with lost replies and resends), failed transactions and confirmation
timeouts never reuse a link byte and never leave a one-sided segment.

A "crash" of a node between two transactions loses nothing but its process memory, and
the services keep none, so it is covered by every interleaving below; a crash *inside* a
transaction is injected by making the transaction's last step (its ledger entry) fail,
which rolls the whole transaction back, as a SIGKILL before commit would.
"""

from __future__ import annotations

import contextlib
import itertools
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st
from sqlalchemy import select

import relaynet
from conftest import Node
from keystrata.config import load_settings
from keystrata.demo.verify import check_network
from keystrata.errors import KeystrataError
from keystrata.ledger import chain
from keystrata.loopback.configs import write_config
from keystrata.node.lifecycle import initialise, load_keyring, open_node
from keystrata.relay import confirmation, operation
from keystrata.storage.db import Database
from keystrata.storage.models import LinkBlock

STATIONS = ("station-a", "station-b")

deliver = st.tuples(st.just("deliver"), st.integers(0, 50), st.booleans())
actions = st.lists(
    st.one_of(
        st.tuples(
            st.just("feed"),
            st.sampled_from(STATIONS),
            st.integers(1, 3),
            st.sampled_from([700, 2048, 4096]),
        ),
        st.tuples(st.just("relay"), st.integers(100, 6000), st.sampled_from(STATIONS)),
        # Deliveries are most of what happens on a network: weight them up.
        deliver,
        deliver,
        deliver,
        st.tuples(st.just("fault"), st.integers(0, 3)),
        st.tuples(st.just("expire"), st.sampled_from(STATIONS)),
    ),
    min_size=5,
    max_size=60,
)


class Crash(Exception):
    """Stands for a process dying inside a transaction."""


@contextmanager
def faults(monkeypatch: pytest.MonkeyPatch) -> Iterator[list[int]]:
    """Arm with ``armed[0] = k``: the k-th ledger append from now raises."""
    armed = [-1]
    real = chain.append

    def append(*args: Any, **kw: Any) -> int:
        if armed[0] == 0:
            armed[0] = -1
            raise Crash()
        if armed[0] > 0:
            armed[0] -= 1
        return real(*args, **kw)

    monkeypatch.setattr(chain, "append", append)
    yield armed


_counter = itertools.count()


def _make(folder: Path, pki: Any, node_id: str, role: str, template: Path) -> Node:
    db_path = folder / f"{node_id}.db"
    shutil.copy(template, db_path)
    path = write_config(
        folder / node_id, node_id=node_id, role=role, db_url=f"sqlite:///{db_path}", pki=pki
    )
    s = load_settings(path, env={})
    db = Database.from_url(s.database.url, sqlite_synchronous="NORMAL")
    initialise(s, db, load_keyring(s))
    return Node(settings=s, config_path=path, ctx=open_node(s, db))


def _one_sided(net: relaynet.RelayNet) -> list[str]:
    a, b = net.segments("station-a"), net.segments("station-b")
    return [
        seg for seg in a.keys() & b.keys() if {a[seg].state, b[seg].state} == {"ready", "discarded"}
    ]


@settings(
    max_examples=40,
    deadline=None,
    derandomize=True,
    # Each example builds three nodes; shrinking a failure would take many minutes, so a
    # failing history is reported as generated.
    phases=[Phase.explicit, Phase.reuse, Phase.generate],
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)
@given(steps=actions)
def test_random_histories_keep_the_invariants(steps, pki, sqlite_template, monkeypatch) -> None:
    folder = Path(tempfile.mkdtemp(prefix="ks-prop-"))
    nodes = [
        _make(folder, pki, n, r, sqlite_template)
        for n, r in (("relay-1", "relay"), ("station-a", "station"), ("station-b", "station"))
    ]
    try:
        for node in nodes:
            relaynet.provision(node)
        net = relaynet.RelayNet(relay=nodes[0], a=nodes[1], b=nodes[2])
        # Some link key at both ends to start with, so relay operations can happen.
        for station in STATIONS:
            net.feed(station, 3)
        with faults(monkeypatch) as armed:
            for step in steps:
                # A failed step rolled its transaction back; the history goes on.
                with contextlib.suppress(Crash, KeystrataError):
                    _apply(net, step, armed)
                assert _one_sided(net) == []
            armed[0] = -1
        # Let every message through; time out whatever cannot complete; again.
        net.drain()
        for station in STATIONS:
            confirmation.expire_pending(
                net.nodes[station].ctx, datetime.now(UTC) + timedelta(days=1)
            )
        net.drain()
        assert _one_sided(net) == []
        a, b = net.segments("station-a"), net.segments("station-b")
        for seg in a.keys() | b.keys():
            assert seg in a and seg in b, "a segment known at one station only"
            assert a[seg].state == b[seg].state, (seg, a[seg].state, b[seg].state)
            if a[seg].state == "ready":
                assert net.key_digest("station-a", seg) == net.key_digest("station-b", seg)
        # Both ends of each link consumed exactly the same bytes of every block.
        for station, link in relaynet.LINKS.items():
            assert _used(net.relay, link) == _used(net.nodes[station], link)
        check = check_network(
            net.relay.config_path, {s: net.nodes[s].config_path for s in STATIONS}
        )
        assert check.problems == []
    finally:
        for node in nodes:
            node.ctx.db.dispose()
        shutil.rmtree(folder, ignore_errors=True)


def _used(node: Node, link: str) -> dict[str, int]:
    with node.ctx.db.read() as s:
        return {
            b.block_id: b.used
            for b in s.execute(select(LinkBlock).where(LinkBlock.link_id == link)).scalars()
        }


def _apply(net: relaynet.RelayNet, step: tuple[Any, ...], armed: list[int]) -> None:
    kind = step[0]
    if kind == "feed":
        net.feed(step[1], step[2], block_bytes=step[3], retries=3)
    elif kind == "relay":
        operation.make_segment(net.relay.ctx, relaynet.PAIR, step[1], cipher_station=step[2])
    elif kind == "deliver":
        pending = net.pending()
        if pending:
            sender, message = pending[step[1] % len(pending)]
            net.deliver(sender, message, lose_reply=step[2])
    elif kind == "fault":
        armed[0] = step[1]
    elif kind == "expire":
        confirmation.expire_pending(
            net.nodes[step[1]].ctx, datetime.now(UTC) + timedelta(seconds=1)
        )
