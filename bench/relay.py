"""Relay figures: ready pair key per second end to end (relay-1 and two stations on
loopback, link key fed beforehand, then the scheduler let loose), and the peak resident
memory of the relay node's processes meanwhile.

Ready pair key is what both stations can serve: the smaller of the two stations'
``ready_bits`` for pair-ab (``GET /api/v1/pairs``). It is sampled while the relay works
through the link key it holds; the rate is the growth between the first sample above
zero and the last sample that grew.
"""

from __future__ import annotations

import threading
import time
from contextlib import ExitStack
from typing import Any

from bench import common, network, profiling
from bench.common import Figure, Workspace, memory_kib, process_tree

#: Relay settings of the run: the defaults of config.py but a short cycle (a relay that
#: waits a second between cycles idles while segments settle).
RELAY_SETTINGS = "\n[relay]\ncycle_seconds = 0.1\n"
#: The glibc malloc settings of the deploy files (deploy/systemd/keystrata@.service,
#: deploy/compose.yaml), so the memory figure is that of a node as deployed.
MALLOC_ENV = {"MALLOC_ARENA_MAX": "2", "MALLOC_MMAP_THRESHOLD_": "131072"}


class MemorySampler:
    """Peak resident memory of a process and its descendants: the largest sum of
    VmRSS seen every ``every`` seconds, and the sum of each process's own peak (VmHWM,
    an upper bound of any moment's total)."""

    def __init__(self, pid: int, every: float = 0.2) -> None:
        self.pid = pid
        self.every = every
        self.peak_rss_kib = 0
        self.hwm_kib: dict[int, int] = {}
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _sample(self) -> None:
        pids = process_tree(self.pid)
        self.peak_rss_kib = max(self.peak_rss_kib, sum(memory_kib(p, "VmRSS") for p in pids))
        for p in pids:
            self.hwm_kib[p] = max(self.hwm_kib.get(p, 0), memory_kib(p, "VmHWM"))

    def _run(self) -> None:
        while not self._stop.wait(self.every):
            self._sample()

    def stop(self) -> None:
        self._sample()
        self._stop.set()
        self._thread.join()

    def now_mb(self) -> float:
        """Resident memory of the process tree at this moment, MB."""
        return sum(memory_kib(p, "VmRSS") for p in process_tree(self.pid)) * 1024 / 1e6

    @property
    def peak_mb(self) -> float:
        """The peak in MB (10**6 bytes), the unit of the issue's target."""
        return max(self.peak_rss_kib, sum(self.hwm_kib.values())) * 1024 / 1e6


def _ready_bits(ws: Workspace, nodes: dict[str, Any]) -> int:
    return min(int(v["ready_bits"]) for v in network.station_views(ws, nodes).values())


def measure(
    ws: Workspace, backend: str, per_link_bytes: int, *, max_seconds: float
) -> list[Figure]:
    """Relay ``per_link_bytes`` of link key per link; return the rate and the memory."""
    with common.environment(MALLOC_ENV):
        nodes = network.start(ws, backend, relay_settings=RELAY_SETTINGS, policy=network.STOPPED)
    relay_pid = nodes["relay-1"].proc.pid
    memory = MemorySampler(relay_pid)
    idle_mb = memory.now_mb()
    try:
        network.feed(ws, nodes, per_link_bytes)
        fed_mb, fed_peak_mb = memory.now_mb(), memory.peak_mb
        profiles = ExitStack()
        for name, node in nodes.items():
            profiles.enter_context(profiling.record(node.proc.pid, f"relay-{name}"))
        network.set_policy(ws, nodes, network.UNBOUNDED)
        cpu_before = common.cpu_seconds(relay_pid)
        started = time.monotonic()
        samples: list[tuple[float, int]] = []
        last_growth: float | None = None
        while time.monotonic() - started < max_seconds:
            samples.append((time.monotonic(), _ready_bits(ws, nodes)))
            if len(samples) > 1 and samples[-1][1] > samples[-2][1]:
                last_growth = samples[-1][0]
            if last_growth is not None and samples[-1][0] - last_growth > 3.0:
                break  # the relay has run out of link key
            time.sleep(0.25)
        cpu = common.cpu_seconds(relay_pid) - cpu_before
        profiles.close()
    finally:
        memory.stop()
        network.stop(nodes)
    growing = [(t, b) for t, b in samples if b > 0]
    stop = last_growth if last_growth is not None else 0.0
    end = max((i for i in range(len(samples)) if samples[i][0] <= stop), default=0)
    if len(growing) < 2 or samples[end][0] <= growing[0][0]:
        rate = 0.0
    else:
        rate = (samples[end][1] - growing[0][1]) / (samples[end][0] - growing[0][0])
    relayed = samples[end][1] if samples else 0
    made_mb = (samples[-1][1] - samples[0][1]) / 8e6 if samples else 0.0
    label = "SQLite" if backend == "sqlite" else "PostgreSQL"
    note = (
        f"{relayed / 8e6:.1f} MB ready at both stations from {per_link_bytes / 1e6:.0f} MB "
        f"per link; default [relay] settings but cycle_seconds = 0.1; glibc malloc "
        "settings of the deploy files"
    )
    return [
        Figure(f"relay: ready pair key, end to end ({label})", rate / 1e6, "Mbit/s", note=note),
        Figure(
            f"relay CPU per MB of ready pair key ({label})",
            cpu / made_mb if made_mb > 0 else float("nan"),
            "CPU-s/MB",
            note=f"{cpu:.1f} CPU-s of the relay process (user and system, /proc) for "
            f"{made_mb:.1f} MB made ready at both stations while it relayed",
        ),
        Figure(
            f"relay node peak resident memory ({label}, during the relay run)",
            memory.peak_mb,
            "MB",
            note=f"{len(memory.hwm_kib)} process(es), VmHWM and VmRSS from /proc "
            f"({memory.peak_mb * 1e6 / 2**20:.0f} MiB); idle after start {idle_mb:.0f} MB, "
            f"peak while fed link key {fed_peak_mb:.0f} MB (now {fed_mb:.0f} MB), "
            "then relaying",
        ),
    ]
