"""Key delivery figures (ETSI GS QKD 014): Get key (``enc_keys``, one key of 256 bits)
at station-a and Get key with key IDs (``dec_keys``, the same keys) at station-b, over
HTTPS with mutual TLS from 16 concurrent clients, each beside the bare endpoint of
:mod:`bench.ceilings` run with the same server options and worker count.

The network is stocked first: link key is fed, the relay turns it into ready pair key,
then the pair's buffer target is set to zero so the relay is idle while we measure and
both stations hold the same settled segments.
"""

from __future__ import annotations

import contextlib
import json
import subprocess
import sys
import time
import uuid
from pathlib import Path
from typing import Any

import httpx

from bench import common, loadgen, network, profiling
from bench.common import REPO, Figure, Workspace
from bench.loadgen import LoadResult
from keystrata.loopback.processes import free_port

CLIENTS = 16
#: Requests per second the stock of ready key is sized for (runs dry above it).
RATE_GUESS = 2000
#: The relay's settings while stocking: the defaults, but a shorter cycle so the
#: stations are stocked in seconds (these runs measure key delivery, not relaying).
RELAY_SETTINGS = "\n[relay]\ncycle_seconds = 0.1\n"
JSON = {"Content-Type": "application/json"}
ENC_BODY = json.dumps({"number": 1, "size": 256}).encode()
ENC_PATH = "/api/v1/keys/sae-b1/enc_keys"
DEC_PATH = "/api/v1/keys/sae-a1/dec_keys"


def _dec_body(key_id: str) -> bytes:
    return json.dumps({"key_IDs": [{"key_ID": key_id}]}).encode()


class Ceiling:
    """The bare endpoint as its own uvicorn process (python -m bench.ceilings)."""

    def __init__(self, ws: Workspace, workers: int) -> None:
        self.port = free_port()
        self.url = f"https://127.0.0.1:{self.port}"
        pki = ws.pki
        log = ws.folder("ceiling") / "ceiling.log"
        with open(log, "ab") as out:
            self.proc = subprocess.Popen(  # noqa: S603 - our own module, fixed arguments
                [
                    sys.executable,
                    "-m",
                    "bench.ceilings",
                    "--port",
                    str(self.port),
                    "--workers",
                    str(workers),
                    "--cert",
                    str(pki.cert("station-a")),
                    "--key",
                    str(pki.key("station-a")),
                    "--ca",
                    str(pki.ca),
                ],
                cwd=REPO,
                stdout=out,
                stderr=subprocess.STDOUT,
            )
        tls = ws.pki.identity("sae-a1").ssl_context()
        deadline = time.monotonic() + 30
        while True:
            try:
                r = httpx.post(
                    self.url + ENC_PATH, content=ENC_BODY, headers=JSON, verify=tls, timeout=2
                )
                if r.status_code == 200:
                    return
            except httpx.HTTPError:
                pass
            if self.proc.poll() is not None or time.monotonic() > deadline:
                self.stop()
                raise RuntimeError(f"the ceiling server did not start:\n{log.read_text()}")
            time.sleep(0.2)

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(15)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)


def _stock(ws: Workspace, nodes: dict[str, Any], per_link_bytes: int, need_bits: int) -> None:
    """Feed link key, let the relay make ready key until station-a owns ``need_bits``,
    then stop the relay and wait until every segment has settled at both stations."""
    network.feed(ws, nodes, per_link_bytes)

    def stocked() -> bool:
        return int(network.station_views(ws, nodes)["station-a"]["owned_ready_bits"]) >= need_bits

    network.wait("ready pair key owned by station-a", stocked, timeout=180)
    network.set_policy(ws, nodes, network.STOPPED)
    network.wait("every segment settled", lambda: network.settled(ws, nodes), timeout=120)


def _known_at_b(ws: Workspace, nodes: dict[str, Any]) -> int:
    """How many key allocations from station-a station-b holds for its slaves."""
    with network.operator(ws, nodes["station-b"]) as ops:
        pairs = ops.deliveries()["pairs"]
    return sum(int(p["waiting"]["keys"]) for p in pairs)


def _peer_batches(log: Path) -> str:
    """How often station-b's peers reached it, from its access log (batch requests of
    several messages each; their per-message answers are in the body, not the log)."""
    lines = log.read_text(errors="replace").splitlines()
    batches = sum(1 for line in lines if "POST /api/v1/peer/messages/batch" in line)
    return f"station-b received {batches} batch requests of peer messages"


def _figures(label: str, real: LoadResult, top: LoadResult, stock: str) -> list[Figure]:
    note = (
        f"{real.requests} requests in {real.seconds:.1f} s; client CPU {real.client_cpu:.2f} "
        f"core (ceiling run {top.client_cpu:.2f}); {stock}"
    )
    if real.errors or top.errors:
        note += (
            f"; errors {real.errors} (ceiling {top.errors}): {real.first_error or top.first_error}"
        )
    return [
        Figure(f"{label}", real.rps, "requests/s", top.rps, note=note),
        Figure(f"{label} p50", real.p50, "ms", top.p50),
        Figure(f"{label} p99", real.p99, "ms", top.p99),
    ]


def measure(
    ws: Workspace,
    backend: str,
    workers: int,
    *,
    warmup: float,
    duration: float,
    catch_up: float = 60.0,
) -> list[Figure]:
    """Get key and Get key with key IDs on ``backend`` with ``workers`` per station;
    station-b gets up to ``catch_up`` seconds to apply station-a's allocations before
    Get key with key IDs is measured."""
    where = f"{workers} worker{'s' if workers > 1 else ''}, " + (
        "SQLite" if backend == "sqlite" else "PostgreSQL"
    )
    # Enough owned key for RATE_GUESS requests/s for the whole run, with margin.
    need_bits = int(RATE_GUESS * (warmup + duration) * 256 * 1.2)
    per_link = need_bits // 8 * 2 + (1 << 20)  # station-a owns about half of it
    nodes = network.start(
        ws,
        backend,
        relay_settings=RELAY_SETTINGS,
        policy=network.UNBOUNDED,
        station_workers=workers,
    )
    ceiling = None
    try:
        _stock(ws, nodes, per_link, need_bits)
        owned = network.station_views(ws, nodes)["station-a"]["owned_ready_bits"]
        stock = f"station-a held {int(owned) / 8e6:.2f} MB of owned ready key at the start"
        ceiling = Ceiling(ws, workers)
        master = ws.pki.identity("sae-a1").ssl_context()
        slave = ws.pki.identity("sae-b1").ssl_context()

        def enc() -> tuple[str, bytes]:
            return ENC_PATH, ENC_BODY

        top_enc = loadgen.run(ceiling.url, master, enc, warmup=warmup, duration=duration)
        ids: list[str] = []

        def keep(_path: str, answer: bytes) -> None:
            ids.extend(k["key_ID"] for k in json.loads(answer)["keys"])

        station_a = nodes["station-a"].proc.pid
        cpu_before = common.cpu_seconds(station_a)
        with profiling.record(station_a, f"etsi-{backend}-enc_keys"):
            real_enc = loadgen.run(
                nodes["station-a"].url,
                master,
                enc,
                on_answer=keep,
                warmup=warmup,
                duration=duration,
            )
        enc_cpu = common.cpu_seconds(station_a) - cpu_before
        enc_keys_served = len(ids)
        # Give station-b's copy time to catch up; what it has not heard of by then,
        # Get key with key IDs pulls from station-a on demand (a path of its own).
        with contextlib.suppress(TimeoutError):
            network.wait(
                "station-b to hear of the allocations",
                lambda: _known_at_b(ws, nodes) >= len(ids),
                timeout=catch_up,
            )
        known = _known_at_b(ws, nodes)
        stock += f"; station-b had applied {known} of {len(ids)} allocations before dec_keys"

        def dec_random() -> tuple[str, bytes]:
            return DEC_PATH, _dec_body(str(uuid.uuid4()))

        top_dec = loadgen.run(ceiling.url, slave, dec_random, warmup=warmup, duration=duration)
        todo = iter(ids)

        def dec() -> tuple[str, bytes] | None:
            key_id = next(todo, None)
            return None if key_id is None else (DEC_PATH, _dec_body(key_id))

        with profiling.record(nodes["station-b"].proc.pid, f"etsi-{backend}-dec_keys"):
            real_dec = loadgen.run(
                nodes["station-b"].url, slave, dec, warmup=warmup, duration=duration
            )
        stock += f"; {_peer_batches(nodes['station-b'].log)}"
    finally:
        if ceiling is not None:
            ceiling.stop()
        network.stop(nodes)
    enc_label = f"Get key (enc_keys 1x256 bit, {CLIENTS} clients, {where})"
    dec_label = f"Get key with key IDs (dec_keys, {CLIENTS} clients, {where})"
    cpu_figure = Figure(
        f"station CPU per 1,000 keys, Get key ({where})",
        1000 * enc_cpu / enc_keys_served if enc_keys_served else float("nan"),
        "CPU-s",
        note=f"{enc_cpu:.1f} CPU-s of station-a's processes (user and system, /proc) for "
        f"{enc_keys_served} keys over the whole load run, warm-up included",
    )
    return [
        *_figures(enc_label, real_enc, top_enc, stock),
        cpu_figure,
        *_figures(dec_label, real_dec, top_dec, stock),
    ]
