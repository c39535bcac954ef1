"""The network under load: its own PKI and PostgreSQL databases, made at run time, three
``keystrata serve`` processes on loopback ports (the loopback harness's network),
provisioned through the operator API, and link key pushed by QKD module clients until
enough pair key is ready."""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import psycopg

from keystrata.loopback import network as loopback
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.pki import make_pki as make_loopback_pki
from keystrata.loopback.processes import NodeProcess
from keystrata_client import OperatorClient

PAIR = loopback.PAIR
NODES = loopback.NETWORK
LINKS = loopback.NETWORK_LINKS
OPERATOR = "ops-load"
BLOCK_BYTES = 64 * 1024
BLOCKS_PER_PUSH = 16
#: Connections per worker process: up to twice this with overflow, so the five processes
#: (two stations of two workers, one relay) stay within 40 of PostgreSQL's default 100.
POOL_SIZE = 4
STATION_WORKERS = 2
RELAY_SETTINGS = "\n[relay]\ncycle_seconds = 0.5\n"


def make_pki(folder: Path, clients: dict[str, str]) -> PkiFiles:
    """Make a CA, a certificate per node and per client (name -> role), at run time."""
    return make_loopback_pki(folder, "keystrata load test CA", NODES, clients)


@dataclass
class Databases:
    """PostgreSQL databases of the run, created on start and dropped at the end."""

    admin_url: str
    names: dict[str, str] = field(default_factory=dict)

    def _connect(self) -> psycopg.Connection[Any]:
        url = self.admin_url.replace("postgresql+psycopg://", "postgresql://")
        return psycopg.connect(url, autocommit=True, connect_timeout=5)

    def create(self, node_ids: list[str]) -> dict[str, str]:
        """Create one empty database per node; return node -> SQLAlchemy URL."""
        base = self.admin_url.replace("postgresql://", "postgresql+psycopg://", 1)
        base = base.rsplit("/", 1)[0]
        with self._connect() as admin:
            for node in node_ids:
                name = f"ks_load_{os.getpid()}_{node.replace('-', '_')}"
                admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
                admin.execute(f'CREATE DATABASE "{name}"')
                self.names[node] = name
        return {node: f"{base}/{name}" for node, name in self.names.items()}

    def drop(self) -> None:
        with self._connect() as admin:
            for name in self.names.values():
                admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        self.names.clear()


def start(
    folder: Path,
    pki: PkiFiles,
    db_urls: dict[str, str],
    saes: Mapping[str, str],
    policy: dict[str, Any],
) -> dict[str, NodeProcess]:
    """Initialise and start the relay (one worker) and the stations (two workers each),
    each knowing the others as ``[[peers]]``, and describe the network on every node:
    nodes, peers, links, QKD modules, the pair with ``policy``, and the SAEs
    (name -> station) at the stations."""
    return loopback.start_network(
        folder,
        pki,
        db_urls,
        node_extra={loopback.RELAY: RELAY_SETTINGS},
        database_extra=f"pool_size = {POOL_SIZE}\n",
        policy=policy,
        saes=saes,
        station_workers=STATION_WORKERS,
        operator=OPERATOR,
        timeout=60,
    )


def feed_links(nodes: dict[str, NodeProcess], pki: PkiFiles, bytes_per_link: int) -> int:
    """Push the same random blocks to both ends of each link, as its QKD module would
    (binary block records); return the bytes pushed per link."""
    blocks = max(1, -(-bytes_per_link // BLOCK_BYTES))
    return loopback.feed_links(
        nodes,
        pki,
        blocks,
        block_bytes=BLOCK_BYTES,
        per_request=BLOCKS_PER_PUSH,
        epsilon=1e-12,
        attempts=3,
    )


def ready_keys(station: NodeProcess, pki: PkiFiles, master: str, slave: str) -> int:
    """Keys of the default size that ``master`` could take now (ETSI Get status)."""
    with httpx.Client(verify=pki.identity(master).ssl_context(), timeout=10) as client:
        r = client.get(f"{station.url}/api/v1/keys/{slave}/status")
        r.raise_for_status()
        return int(r.json()["stored_key_count"])


def delivery_counts(node: NodeProcess, pki: PkiFiles) -> dict[str, int]:
    """The station's own accounting for the pair (GET /api/v1/deliveries); it reads
    every allocation and refusal, so it is given time after a long run."""
    with OperatorClient(node.url, pki.identity(OPERATOR), timeout=300) as ops:
        answer = ops.deliveries()
    for pair in answer["pairs"]:
        if pair["pair_id"] == PAIR:
            return {k: int(pair[k]["keys"]) for k in ("to_masters", "to_slaves", "waiting")}
    return {"to_masters": 0, "to_slaves": 0, "waiting": 0}
