"""A real relay network for the benchmarks: relay-1, station-a and station-b as
``keystrata serve`` processes on loopback, started and provisioned by the end-to-end
test helper ``tests/processes.py: start_network``, fed with link key through the QKD
module API (binary form), as a QKD module would.
"""

from __future__ import annotations

import os
import time
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from typing import Any

from bench import common
from bench.common import Workspace, test_helper

LINKS = {"station-a": "link-a", "station-b": "link-b"}
#: A policy whose target no run reaches: the scheduler relays all the link key it has.
UNBOUNDED = {"buffer_min_bits": 0, "buffer_target_bits": 2**40, "buffer_max_bits": 2**40}
#: Seconds a node may take to answer after it was started.
START_TIMEOUT = 300.0
STOPPED = {"buffer_min_bits": 0, "buffer_target_bits": 0, "buffer_max_bits": 0}


@contextmanager
def node_settings() -> Iterator[None]:
    """Settings every node started inside gets, through the environment overrides
    ``load_settings`` reads (``KEYSTRATA_<SECTION>__<KEY>``), restored afterwards: the
    run's SQLite durability (the test helpers write NORMAL into node files)."""
    with common.environment({"KEYSTRATA_DATABASE__SQLITE_SYNCHRONOUS": common.SQLITE_SYNCHRONOUS}):
        yield


@contextmanager
def patient_start(timeout: float = START_TIMEOUT) -> Iterator[None]:
    """Let ``processes.NodeProcess.start`` wait ``timeout`` seconds for a node to
    answer (the test helper waits 20 s, which a node starting beside several others on
    two busy cores can miss); restored afterwards."""
    node_process = test_helper("processes").NodeProcess
    original = node_process.start

    def start(self: Any, pki: Any, timeout: float = timeout) -> Any:
        return original(self, pki, timeout)

    node_process.start = start
    try:
        yield
    finally:
        node_process.start = original


def start(
    ws: Workspace,
    backend: str,
    *,
    relay_settings: str,
    policy: dict[str, int],
    station_workers: int = 1,
) -> dict[str, Any]:
    """Start and provision the network (SAEs included) on ``backend``; return the
    nodes (``processes.NodeProcess`` by node ID). Nodes use SQLite with the run's
    durability; the stations run ``station_workers`` uvicorn workers (the relay one)."""
    processes = test_helper("processes")
    urls = {n: ws.sqlite_url(n) if backend == "sqlite" else ws.pg_url(n) for n in processes.NETWORK}
    with node_settings(), patient_start():
        nodes: dict[str, Any] = processes.start_network(
            ws.folder(f"net-{backend}"),
            ws.pki,
            urls,
            extra=relay_settings,
            policy=policy,
            saes=True,
        )
        if station_workers > 1:
            # Restarted one at a time: several multi-worker nodes starting at once on
            # two busy cores can take longer than the helper's start-up timeout.
            for station in LINKS:
                node = nodes[station]
                node.stop()
                text = node.config.read_text()
                node.config.write_text(
                    text.replace("[server]\n", f"[server]\nworkers = {station_workers}\n", 1)
                )
                node.start(ws.pki, timeout=START_TIMEOUT)
    return nodes


def stop(nodes: dict[str, Any]) -> None:
    test_helper("processes").stop_all(list(nodes.values()))


def identity(ws: Workspace, name: str) -> Any:
    from keystrata_client import TlsIdentity

    return TlsIdentity(ca=ws.pki.ca, cert=ws.pki.cert(name), key=ws.pki.key(name))


def blocks(total_bytes: int, block_bytes: int) -> list[Any]:
    """Random link key blocks (``keystrata_client.LinkBlock``) adding up to about
    ``total_bytes``."""
    from keystrata_client import LinkBlock

    now = datetime.now(UTC)
    return [
        LinkBlock(
            block_id=str(uuid.uuid4()),
            key=os.urandom(block_bytes),
            qber=0.02,
            epsilon=1e-10,
            produced_at=now,
        )
        for _ in range(max(1, total_bytes // block_bytes))
    ]


def feed(
    ws: Workspace,
    nodes: dict[str, Any],
    per_link_bytes: int,
    *,
    block_bytes: int = 4096,
    per_request: int = 1024,
) -> None:
    """Push the same fresh link key blocks to both ends of each link (binary form)."""
    from keystrata_client import ModuleClient

    for station, link in LINKS.items():
        batch = blocks(per_link_bytes, block_bytes)
        for end in ("relay-1", station):
            with ModuleClient(
                nodes[end].url, identity(ws, f"mod-{link}"), attempts=10, timeout=60
            ) as module:
                for i in range(0, len(batch), per_request):
                    module.push_blocks(link, batch[i : i + per_request])


def operator(ws: Workspace, node: Any) -> Any:
    from keystrata_client import OperatorClient

    return OperatorClient(node.url, identity(ws, "ops-ada"), timeout=30)


def set_policy(ws: Workspace, nodes: dict[str, Any], policy: dict[str, int]) -> None:
    with operator(ws, nodes["relay-1"]) as ops:
        ops.change("pairs", "pair-ab", {"policy": policy})


def station_views(ws: Workspace, nodes: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """Each station's view of pair-ab (ready, owned and pending bits)."""
    out = {}
    for station in LINKS:
        with operator(ws, nodes[station]) as ops:
            (view,) = ops.pairs()["pairs"]
        out[station] = view
    return out


def in_flight_bits(ws: Workspace, nodes: dict[str, Any]) -> int:
    with operator(ws, nodes["relay-1"]) as ops:
        return sum(int(p["in_flight_bits"]) for p in ops.pairs()["pairs"])


def settled(ws: Workspace, nodes: dict[str, Any]) -> bool:
    """Nothing on its way: no segment in flight at the relay, none pending at either
    station, and both stations hold the same ready key."""
    if in_flight_bits(ws, nodes):
        return False
    a, b = station_views(ws, nodes).values()
    return bool(a["pending_bits"] == b["pending_bits"] == 0 and a["ready_bits"] == b["ready_bits"])


def wait(what: str, check: Callable[[], bool], timeout: float, every: float = 0.3) -> None:
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise TimeoutError(f"timed out after {timeout:.0f} s waiting for {what}")
        time.sleep(every)
