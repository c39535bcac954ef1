"""Link key ingest figures: bits per second a node stores from a QKD module pushing
binary block batches (``POST /api/v1/links/{link_id}/blocks``, application/octet-stream,
mutual TLS), beside the ceiling: the same bytes sealed with the node's AES-256-GCM
``Keyring`` and inserted as ``link_block`` rows of the same block size and batch, in
the same SQLite file with the node's engine settings, one transaction per batch, no
web layer (no parsing, fingerprints, duplicate checks or ledger entry).
"""

from __future__ import annotations

import os
import time
import uuid
from datetime import UTC, datetime
from typing import Any

from sqlalchemy import insert

from bench import common, loadgen, network, profiling
from bench.common import Figure, Workspace
from keystrata.crypto.hazmat import Keyring
from keystrata.loopback.processes import prepare_node
from keystrata.storage.db import Database
from keystrata.storage.models import LinkBlock
from keystrata.storage.sealed import block_context

LINK = "link-a"
PATH = f"/api/v1/links/{LINK}/blocks"
#: Random bytes the blocks are cut from (block IDs are always new, so every block is
#: stored; repeating bytes under new IDs costs the node exactly as much).
POOL_BYTES = 32 << 20
#: Concurrent pushes (two QKD modules' worth).
CLIENTS = 2


class Blocks:
    """Endless fresh blocks of ``block_bytes``, ``per_request`` to a batch."""

    def __init__(self, block_bytes: int, per_request: int) -> None:
        from keystrata_client import LinkBlock as Block

        self.block = Block
        self.block_bytes = block_bytes
        self.per_request = per_request
        self.pool = os.urandom(POOL_BYTES)
        self.offset = 0

    def batch(self) -> list[bytes]:
        out = []
        for _ in range(self.per_request):
            if self.offset + self.block_bytes > len(self.pool):
                self.offset = 0
            out.append(self.pool[self.offset : self.offset + self.block_bytes])
            self.offset += self.block_bytes
        return out

    def body(self) -> bytes:
        from keystrata_client._blocks import encode_binary

        now = datetime.now(UTC)
        return encode_binary(
            self.block(str(uuid.uuid4()), k, 0.02, 1e-10, now) for k in self.batch()
        )


def _start_node(ws: Workspace) -> Any:
    """A relay node on SQLite with link-a and its QKD module provisioned."""
    folder = ws.folder("ingest")
    with network.node_settings():
        node = prepare_node(folder, ws.pki, "relay-1", "relay", f"sqlite:///{folder}/relay-1.db")
        node.start(ws.pki, timeout=network.START_TIMEOUT)
    with network.operator(ws, node) as ops:
        ops.create("nodes", {"node_id": "station-a", "role": "station"})
        ops.create("links", {"link_id": LINK, "relay_id": "relay-1", "station_id": "station-a"})
        ops.create(
            "principals",
            {
                "principal_id": "mod-link-a",
                "role": "qkd-module",
                "cert_subject": "mod-link-a",
                "link_id": LINK,
            },
        )
    return node


def ceiling(url: str, source: Blocks, *, warmup: float, duration: float) -> float:
    """Bits per second sealed and inserted, one transaction per batch."""
    db = Database.from_url(url, sqlite_synchronous=common.SQLITE_SYNCHRONOUS)
    keyring = Keyring(os.urandom(32))
    placeholder = bytes(32)  # the node's fingerprint column; computing it is not sealing
    stored = 0
    try:
        start = time.perf_counter()
        measure_from, end = start + warmup, start + warmup + duration
        counted_from = None
        while (now := time.perf_counter()) < end:
            if counted_from is None and now >= measure_from:
                counted_from, stored = now, 0
            at = datetime.now(UTC)
            rows = []
            for key in source.batch():
                block_id = str(uuid.uuid4())
                rows.append(
                    {
                        "link_id": LINK,
                        "block_id": block_id,
                        "length": len(key),
                        "used": 0,
                        "qber": 0.02,
                        "epsilon": 1e-10,
                        "produced_at": at,
                        "received_at": at,
                        "fingerprint": placeholder,
                        "sealed": keyring.seal(key, block_context(LINK, block_id, 0)),
                    }
                )
            with db.write() as s:
                s.execute(insert(LinkBlock), rows)
            stored += 8 * source.block_bytes * len(rows)
        return stored / (time.perf_counter() - (counted_from or start))
    finally:
        db.dispose()


def measure(
    ws: Workspace, block_bytes: int, per_request: int, *, warmup: float, duration: float
) -> list[Figure]:
    node = _start_node(ws)
    try:
        source = Blocks(block_bytes, per_request)
        tls = ws.pki.identity("mod-link-a").ssl_context()

        def push() -> tuple[str, bytes]:
            return PATH, source.body()

        with profiling.record(node.proc.pid, f"ingest-{block_bytes}"):
            real = loadgen.run(
                node.url,
                tls,
                push,
                clients=CLIENTS,
                warmup=warmup,
                duration=duration,
                content_type="application/octet-stream",
            )
        db_url = f"sqlite:///{node.config.parent}/relay-1.db"
        top = ceiling(db_url, source, warmup=warmup, duration=duration)
    finally:
        node.stop()
    bits = real.rps * per_request * block_bytes * 8
    note = (
        f"{CLIENTS} pushers, {per_request} blocks of {block_bytes} bytes per request; "
        f"request p50 {real.p50:.0f} ms; ceiling: seal + insert, one transaction per batch"
    )
    if real.errors:
        note += f"; {real.errors} errors: {real.first_error}"
    size = f"{block_bytes // 1024} KiB" if block_bytes >= 1024 else f"{block_bytes} B"
    return [
        Figure(
            f"link key ingest (binary, {size} blocks x {per_request}, SQLite)",
            bits / 1e6,
            "Mbit/s",
            top / 1e6,
            note=note,
        )
    ]
