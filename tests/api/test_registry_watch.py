"""Nodes compare the registry facts they share with each peer and raise an alert on any
disagreement (metric, readiness note, ledger entry), never guessing who is right.

Three nodes in one process (relay-1, station-a, station-b; ``tests/relaynet.py``'s
registry and SAEs), each on its own real database, both backends. A node asks its peer
through the peer's real ASGI app with its own node certificate (the route, the identity
dependency and the peer principal's pin are all real); only the HTTPS transport of the
process's ``PeerClient`` is left out (the lead's three-node process test has it).
"""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable
from typing import Any

import pytest
from sqlalchemy import select

import relaynet
from conftest import Node, NodeFactory
from helpers import ledger_events, snapshot
from keystrata.context import NodeContext
from keystrata.errors import PeerUnavailable
from keystrata.loopback.configs import peers_section
from keystrata.node import registry_watch
from keystrata.node.lifecycle import open_node
from keystrata.node.loops import Background
from keystrata.peering.client import PeerClient
from keystrata.registry import provisioning
from keystrata.registry.specs import Kind, PairChange
from keystrata.storage.db import Database
from keystrata.storage.models import LedgerEntry, PeerRegistryView
from scrapes import READY, scrape

ROUTE = "/api/v1/peer/registry/shared"
NAMES = ("relay-1", "station-a", "station-b")
PRIORITY = [{"kind": "pair", "id": "pair-ab", "field": "policy.priority"}]
DISAGREES, AGREES = "registry.peer_disagrees", "registry.peer_agrees"


class ViaApp:
    """The peer-client port, asking each peer's ASGI app as node ``me`` would."""

    def __init__(self, api: Any, nodes: dict[str, Node], me: str) -> None:
        self.clients = {n: api(node)(me) for n, node in nodes.items() if n != me}
        self.down: set[str] = set()
        self.answer: dict[str, Callable[[dict[str, Any]], Any]] = {}

    def registry_shared(self, node_id: str) -> dict[str, Any]:
        if node_id in self.down:
            raise PeerUnavailable(f"{node_id}: ConnectError")
        r = self.clients[node_id].get(ROUTE)
        if r.status_code != 200:
            raise PeerUnavailable(f"{node_id}: answered {r.status_code}")
        body: dict[str, Any] = r.json()
        change = self.answer.get(node_id)
        return change(body) if change else body


@pytest.fixture
def net(make_node: NodeFactory, db_factory: Callable[[], str]) -> relaynet.RelayNet:
    """relaynet's network, each node with [[peers]] for the other two (nothing listens
    there: the tests' port goes through the apps) and a fast comparison interval."""
    made = {}
    for name, role in zip(NAMES, ("relay", "station", "station"), strict=True):
        peers = peers_section({p: "https://127.0.0.1:9" for p in NAMES if p != name})
        extra = peers + "\n[peer]\nregistry_compare_seconds = 0.5\n"
        made[name] = make_node(name, role, db_url=db_factory(), extra=extra)
        relaynet.provision(made[name])
    net = relaynet.RelayNet(relay=made["relay-1"], a=made["station-a"], b=made["station-b"])
    relaynet.provision_saes(net)
    return net


@pytest.fixture
def ports(net: relaynet.RelayNet, api: Any) -> dict[str, ViaApp]:
    return {name: ViaApp(api, net.nodes, name) for name in NAMES}


def _compare_all(net: relaynet.RelayNet, ports: dict[str, ViaApp]) -> dict[tuple[str, str], Any]:
    return {
        (me, peer): registry_watch.compare_with(net.nodes[me].ctx, ports[me], peer)
        for me in NAMES
        for peer in NAMES
        if peer != me
    }


def _set_priority(node: Node, priority: int) -> None:
    change = PairChange(policy={"priority": priority})
    provisioning.change(node.ctx, Kind.PAIRS, "pair-ab", change, actor="test")


def _entries(ctx: NodeContext, event: str) -> list[dict[str, Any]]:
    with ctx.db.read() as s:
        rows = s.execute(select(LedgerEntry).where(LedgerEntry.event == event)).scalars()
        return [json.loads(r.entry) for r in rows]


def test_a_policy_changed_at_the_relay_is_found_by_each_side_and_cleared(
    net: relaynet.RelayNet, ports: dict[str, ViaApp], api: Any
) -> None:
    assert registry_watch.watched(net.relay.ctx) == ["station-a", "station-b"]
    assert all(found == [] for found in _compare_all(net, ports).values())
    for node in net.nodes.values():  # agreeing from the start is nothing to record
        assert DISAGREES not in ledger_events(node.ctx)
        assert AGREES not in ledger_events(node.ctx)

    _set_priority(net.relay, 5)
    found = _compare_all(net, ports)
    for pair in [("relay-1", "station-a"), ("station-a", "relay-1")]:
        assert found[pair] == PRIORITY
    assert found[("relay-1", "station-b")] == found[("station-b", "relay-1")] == PRIORITY
    assert found[("station-a", "station-b")] == found[("station-b", "station-a")] == []
    disagrees = _entries(net.relay.ctx, DISAGREES)
    assert sorted(e["peer"] for e in disagrees) == ["station-a", "station-b"]
    assert all(e["count"] == 1 and e["disagreements"] == PRIORITY for e in disagrees)
    assert [e["peer"] for e in _entries(net.a.ctx, DISAGREES)] == ["relay-1"]
    assert _entries(net.a.ctx, DISAGREES)[0]["disagreements"] == PRIORITY

    # The same finding again is no news: no second entry.
    _compare_all(net, ports)
    assert len(_entries(net.relay.ctx, DISAGREES)) == 2
    assert len(_entries(net.a.ctx, DISAGREES)) == 1

    ops = api(net.a)("ops-ada")
    metrics = scrape(ops)
    assert metrics.value("keystrata_registry_disagreements", peer="relay-1") == 1
    assert metrics.value("keystrata_registry_disagreements", peer="station-b") == 0
    assert 0 <= metrics.value("keystrata_registry_compared_age_seconds", peer="relay-1") < 60
    ready = ops.get(READY)
    assert ready.status_code == 200  # advisory
    note = ready.json()["checks"]["registry"]
    assert note == "disagrees with relay-1 on pair pair-ab policy.priority"

    # The stations follow the relay: everyone agrees again, and says so once.
    for station in (net.a, net.b):
        _set_priority(station, 5)
    assert all(found == [] for found in _compare_all(net, ports).values())
    agrees = _entries(net.relay.ctx, AGREES)
    assert sorted(e["peer"] for e in agrees) == ["station-a", "station-b"]
    assert all(e["cleared"] == 1 for e in agrees)
    assert [e["peer"] for e in _entries(net.a.ctx, AGREES)] == ["relay-1"]
    assert scrape(ops).value("keystrata_registry_disagreements", peer="relay-1") == 0
    assert ops.get(READY).json()["checks"]["registry"] == "ok"
    _compare_all(net, ports)
    assert len(_entries(net.relay.ctx, AGREES)) == 2


def test_saes_and_links_are_compared_where_shared_only(
    net: relaynet.RelayNet, ports: dict[str, ViaApp]
) -> None:
    provisioning.retire(net.a.ctx, Kind.PRINCIPALS, "sae-b1", actor="test")
    provisioning.retire(net.a.ctx, Kind.LINKS, "link-a", actor="test")
    found = _compare_all(net, ports)
    sae = {"kind": "sae", "id": "sae-b1", "field": "retired"}
    assert found[("station-a", "station-b")] == [sae]
    assert found[("station-b", "station-a")] == [sae]
    link = {"kind": "link", "id": "link-a", "field": "retired"}
    assert found[("station-a", "relay-1")] == found[("relay-1", "station-a")] == [link]
    # Station B and the relay share neither that SAE (a relay serves none) nor link-a.
    assert found[("station-b", "relay-1")] == found[("relay-1", "station-b")] == []


def test_an_entry_only_one_side_holds_is_named_from_both_sides(
    net: relaynet.RelayNet, ports: dict[str, ViaApp]
) -> None:
    from keystrata.registry.specs import PairSpec

    # The relay replaces pair-ab by pair-ab2; the stations have not heard of it.
    provisioning.retire(net.relay.ctx, Kind.PAIRS, "pair-ab", actor="test")
    spec = PairSpec(pair_id="pair-ab2", relay_id="relay-1", stations=["station-a", "station-b"])
    provisioning.create(net.relay.ctx, Kind.PAIRS, spec, actor="test")
    found = _compare_all(net, ports)
    retired = {"kind": "pair", "id": "pair-ab", "field": "retired"}
    for station in ("station-a", "station-b"):
        assert found[("relay-1", station)] == [
            retired,
            {"kind": "pair", "id": "pair-ab2", "field": "missing_at_peer"},
        ]
        assert found[(station, "relay-1")] == [
            retired,
            {"kind": "pair", "id": "pair-ab2", "field": "missing_here"},
        ]
    assert found[("station-a", "station-b")] == []


def test_no_answer_keeps_the_last_finding_and_says_why(
    net: relaynet.RelayNet, ports: dict[str, ViaApp], api: Any
) -> None:
    ops = api(net.a)("ops-ada")
    assert registry_watch.compare_with(net.a.ctx, ports["station-a"], "station-b") == []
    assert ops.get(READY).json()["checks"]["registry"] == "not compared with relay-1 yet"
    ports["station-a"].down.add("relay-1")
    assert registry_watch.compare_with(net.a.ctx, ports["station-a"], "relay-1") is None
    metrics = scrape(ops)
    assert metrics.value("keystrata_registry_compared_age_seconds", peer="relay-1") == float("inf")
    # Never compared: no count at all (not a guessed 0).
    assert frozenset({("peer", "relay-1")}) not in metrics.samples(
        "keystrata_registry_disagreements"
    )
    # A peer away from the start: why is said too, not only that it is not compared.
    assert ops.get(READY).json()["checks"]["registry"] == (
        "not compared with relay-1 yet (relay-1: ConnectError)"
    )

    ports["station-a"].down.clear()
    _set_priority(net.relay, 9)
    assert registry_watch.compare_with(net.a.ctx, ports["station-a"], "relay-1") == PRIORITY
    ports["station-a"].down.add("relay-1")
    assert registry_watch.compare_with(net.a.ctx, ports["station-a"], "relay-1") is None
    metrics = scrape(ops)
    assert metrics.value("keystrata_registry_disagreements", peer="relay-1") == 1  # kept
    assert ops.get(READY).json()["checks"]["registry"] == (
        "disagrees with relay-1 on pair pair-ab policy.priority; "
        "not compared with relay-1 lately (relay-1: ConnectError)"
    )
    with net.a.ctx.db.read() as s:
        row = s.get(PeerRegistryView, "relay-1")
        assert row is not None
        assert (row.count, row.last_error) == (1, "relay-1: ConnectError")


def test_a_hostile_answer_is_recorded_as_unusable_and_its_extras_are_ignored(
    net: relaynet.RelayNet, ports: dict[str, ViaApp]
) -> None:
    port = ports["station-a"]
    # Facts about a pair and a link station A is no part of: not compared, not recorded.
    key_like = "6b6579206d6174657269616c2062797465732068657265206b6579206d617465"

    def extras(body: dict[str, Any]) -> dict[str, Any]:
        body["pairs"][key_like] = {
            "relay_id": "relay-1",
            "stations": ["station-b", "station-c"],
            "retired": False,
            "policy": {},
        }
        body["links"]["link-b"] = {"relay_id": "relay-1", "station_id": "station-b"} | {
            "retired": False
        }
        body["saes"]["sae-x"] = {"station_id": "station-c", "retired": False}
        return body

    port.answer["relay-1"] = extras
    assert registry_watch.compare_with(net.a.ctx, port, "relay-1") == []
    before = snapshot(net.a.ctx)
    for name, bad in {
        "malformed": lambda b: b | {"pairs": {key_like: {"relay_id": key_like}}},
        "another node's": lambda b: b | {"peer": "station-b"},
        "not JSON-typed": lambda b: b | {"v": "1"},
    }.items():
        port.answer["relay-1"] = bad
        assert registry_watch.compare_with(net.a.ctx, port, "relay-1") is None, name
    after = snapshot(net.a.ctx)
    assert key_like not in json.dumps(after, default=str)
    changed = {t for t in after if after[t] != before[t]}
    assert changed == {"peer_registry_view"}  # last_error only; no ledger entry
    with net.a.ctx.db.read() as s:
        row = s.get(PeerRegistryView, "relay-1")
        assert row is not None and row.count == 0
        assert row.last_error == "relay-1: the answer is malformed"


def test_two_workers_write_one_ledger_entry(
    net: relaynet.RelayNet, ports: dict[str, ViaApp]
) -> None:
    """Two worker processes of station A (two contexts on its database): one lease
    holder compares; and two recordings of the same finding racing write one entry."""
    second = _second_worker(net.a)
    try:
        _set_priority(net.relay, 3)
        assert registry_watch.compare_once(net.a.ctx, ports["station-a"], "worker-1") is False
        assert registry_watch.compare_once(second, ports["station-a"], "worker-2") is False
        assert len(_entries(net.a.ctx, DISAGREES)) == 1
        # Past the lease: both record the same change at once (the view row exists).
        assert sorted(_race(net.a.ctx, second, "relay-1", [])) == [False, True]
        assert len(_entries(net.a.ctx, AGREES)) == 1
        # A first finding about a peer: the view row is made once, one entry.
        assert sorted(_race(net.a.ctx, second, "station-b", PRIORITY)) == [False, True]
        assert [e["peer"] for e in _entries(net.a.ctx, DISAGREES)] == ["relay-1", "station-b"]
    finally:
        second.db.dispose()


def _race(
    one: NodeContext, two: NodeContext, peer: str, findings: list[dict[str, str]]
) -> list[bool]:
    results: list[bool] = []
    start = threading.Barrier(2)

    def run(ctx: NodeContext) -> None:
        start.wait()
        results.append(registry_watch.record(ctx, peer, findings))

    threads = [threading.Thread(target=run, args=(c,)) for c in (one, two)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=30)
    return results


def _second_worker(node: Node) -> NodeContext:
    db = Database.from_url(node.settings.database.url, sqlite_synchronous="NORMAL")
    return open_node(node.settings, db)


class _AppPeers(PeerClient):
    """The process's real peer client, with the shared-registry call through the app."""

    def __init__(self, settings: Any, via: ViaApp) -> None:
        super().__init__(settings)
        self.via = via

    def registry_shared(self, node_id: str) -> dict[str, Any]:
        return self.via.registry_shared(node_id)


def test_the_background_loop_compares_every_interval(
    net: relaynet.RelayNet, ports: dict[str, ViaApp]
) -> None:
    assert net.a.settings.peer.registry_compare_seconds == 0.5  # from the TOML file
    peers = _AppPeers(net.a.settings, ports["station-a"])
    loops = Background(net.a.ctx, peers)
    loops.start()
    try:
        _set_priority(net.relay, 11)
        deadline = time.monotonic() + 20
        found = None
        while time.monotonic() < deadline:
            views = {v.peer_id: v for v in registry_watch.views(net.a.ctx)}
            found = views["relay-1"].disagreements
            if found == PRIORITY and views["station-b"].checked_at is not None:
                break
            time.sleep(0.1)
        assert found == PRIORITY
    finally:
        loops.stop()
        peers.close()
