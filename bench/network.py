"""A real relay network for the benchmarks: relay-1, station-a and station-b as
``keystrata serve`` processes on loopback, started and provisioned by the loopback
harness (``keystrata.loopback.network``), fed with link key through the QKD module API
(binary form), as a QKD module would.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

from bench import common
from bench.common import Workspace
from keystrata.loopback import network
from keystrata.loopback.processes import NodeProcess, stop_all
from keystrata_client import OperatorClient

LINKS = network.NETWORK_LINKS
#: A policy whose target no run reaches: the scheduler relays all the link key it has.
UNBOUNDED = {"buffer_min_bits": 0, "buffer_target_bits": 2**40, "buffer_max_bits": 2**40}
#: Seconds a node may take to answer after it was started (a node starting beside
#: several others on two busy cores can take long).
START_TIMEOUT = 300.0
STOPPED = {"buffer_min_bits": 0, "buffer_target_bits": 0, "buffer_max_bits": 0}


@contextmanager
def node_settings() -> Iterator[None]:
    """Settings every node started inside gets, through the environment overrides
    ``load_settings`` reads (``KEYSTRATA_<SECTION>__<KEY>``), restored afterwards: the
    run's SQLite durability (the harness writes NORMAL into node files)."""
    with common.environment({"KEYSTRATA_DATABASE__SQLITE_SYNCHRONOUS": common.SQLITE_SYNCHRONOUS}):
        yield


def start(
    ws: Workspace,
    backend: str,
    *,
    relay_settings: str,
    policy: dict[str, int],
    station_workers: int = 1,
) -> dict[str, NodeProcess]:
    """Start and provision the network (SAEs included) on ``backend``; return the
    nodes by node ID. Nodes use the run's SQLite durability; the stations run
    ``station_workers`` uvicorn workers (the relay one)."""
    urls = {n: ws.sqlite_url(n) if backend == "sqlite" else ws.pg_url(n) for n in network.NETWORK}
    with node_settings():
        return network.start_network(
            ws.folder(f"net-{backend}"),
            ws.pki,
            urls,
            extra=relay_settings,
            policy=policy,
            saes=True,
            station_workers=station_workers,
            timeout=START_TIMEOUT,
        )


def stop(nodes: dict[str, NodeProcess]) -> None:
    stop_all(nodes.values())


def feed(
    ws: Workspace,
    nodes: dict[str, NodeProcess],
    per_link_bytes: int,
    *,
    block_bytes: int = 4096,
    per_request: int = 1024,
) -> None:
    """Push the same fresh link key blocks, about ``per_link_bytes`` in all, to both
    ends of each link (binary form)."""
    network.feed_links(
        nodes,
        ws.pki,
        max(1, per_link_bytes // block_bytes),
        block_bytes=block_bytes,
        per_request=per_request,
        attempts=10,
    )


def operator(ws: Workspace, node: NodeProcess) -> OperatorClient:
    return OperatorClient(node.url, ws.pki.identity("ops-ada"), timeout=30)


def set_policy(ws: Workspace, nodes: dict[str, NodeProcess], policy: dict[str, int]) -> None:
    network.set_policy(nodes, ws.pki, policy)


def station_views(ws: Workspace, nodes: dict[str, NodeProcess]) -> dict[str, dict[str, Any]]:
    """Each station's view of pair-ab (ready, owned and pending bits)."""
    out = {}
    for station in LINKS:
        with operator(ws, nodes[station]) as ops:
            (view,) = ops.pairs()["pairs"]
        out[station] = view
    return out


def settled(ws: Workspace, nodes: dict[str, NodeProcess]) -> bool:
    """Nothing on its way: no segment in flight at the relay, none pending at either
    station, and both stations hold the same ready key."""
    if network.in_flight_bits(nodes, ws.pki):
        return False
    a, b = station_views(ws, nodes).values()
    return bool(a["pending_bits"] == b["pending_bits"] == 0 and a["ready_bits"] == b["ready_bits"])


def wait(what: str, check: Callable[[], bool], timeout: float, every: float = 0.3) -> None:
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise TimeoutError(f"timed out after {timeout:.0f} s waiting for {what}")
        time.sleep(every)
