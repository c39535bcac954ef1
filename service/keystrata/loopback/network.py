"""A relay network on loopback: relay-1, station-a and station-b as `keystrata serve`
processes, each knowing the others as peers, provisioned through the operator API and
fed with link key through the QKD module API, as a QKD module would."""

from __future__ import annotations

import os
import uuid
from collections.abc import Mapping
from concurrent.futures import ThreadPoolExecutor
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from keystrata.loopback.configs import FAST_SQLITE, peers_section, set_workers
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import (
    OPERATOR,
    NodeProcess,
    free_ports,
    prepare_node,
    start_all,
    stop_all,
)
from keystrata_client import LinkBlock, ModuleClient, OperatorClient

RELAY = "relay-1"
PAIR = "pair-ab"
#: The nodes of the network: node ID -> role.
NETWORK = {RELAY: "relay", "station-a": "station", "station-b": "station"}
#: Each station's QKD link to the relay.
NETWORK_LINKS = {"station-a": "link-a", "station-b": "link-b"}
#: SAEs registered when asked: SAE ID -> its station.
SAES = {"sae-a1": "station-a", "sae-a2": "station-a", "sae-b1": "station-b", "sae-b2": "station-b"}
#: Client certificates the network's provisioning refers to: name -> role.
CLIENTS = {
    OPERATOR: "operator",
    "mod-link-a": "qkd-module",
    "mod-link-b": "qkd-module",
} | dict.fromkeys(SAES, "sae")


def start_network(
    folder: Path,
    pki: PkiFiles,
    db_urls: Mapping[str, str],
    *,
    extra: str = "",
    node_extra: Mapping[str, str] | None = None,
    database_extra: str = FAST_SQLITE,
    policy: Mapping[str, Any] | None = None,
    saes: bool | Mapping[str, str] = False,
    relay_workers: int = 1,
    station_workers: int = 1,
    operator: str = OPERATOR,
    timeout: float = 20.0,
) -> dict[str, NodeProcess]:
    """Start relay-1, station-a and station-b as processes, each knowing the others as
    peers, and provision them through the operator API (see :func:`provision`).

    ``extra`` is appended to every node's configuration, ``node_extra[node_id]`` to that
    node's; ``database_extra`` are lines of each ``[database]`` table; ``saes`` is True
    for :data:`SAES` or a mapping SAE ID -> station. Each node gets ``timeout`` seconds
    to answer. Returns the nodes by node ID; if start-up or provisioning fails, every
    node is stopped before the error propagates.
    """
    ports = dict(zip(NETWORK, free_ports(len(NETWORK)), strict=True))

    def prepare(node_id: str, role: str) -> NodeProcess:
        peers = {p: f"https://127.0.0.1:{port}" for p, port in ports.items() if p != node_id}
        own = (node_extra or {}).get(node_id, "")
        node = prepare_node(
            folder / node_id,
            pki,
            node_id,
            role,
            db_urls[node_id],
            operator,
            port=ports[node_id],
            extra=extra + own + peers_section(peers),
            database_extra=database_extra,
        )
        node.start_timeout = timeout
        workers = relay_workers if role == "relay" else station_workers
        if workers > 1:
            set_workers(node.config, workers)
        return node

    # `keystrata node init` is a process of its own per node: run the three at once.
    with ThreadPoolExecutor(len(NETWORK)) as pool:
        jobs = {n: pool.submit(prepare, n, role) for n, role in NETWORK.items()}
        nodes = {n: job.result() for n, job in jobs.items()}
    # Nodes that started must not outlive a failed start-up or provisioning.
    try:
        start_all(nodes.values(), pki, client=operator)
        provision(
            nodes,
            pki,
            policy=policy or {},
            saes=SAES if saes is True else (saes or {}),
            operator=operator,
        )
    except BaseException:
        stop_all(nodes.values())
        raise
    return nodes


def provision(
    nodes: Mapping[str, NodeProcess],
    pki: PkiFiles,
    *,
    policy: Mapping[str, Any],
    saes: Mapping[str, str],
    operator: str = OPERATOR,
) -> None:
    """Describe the network on every node through the operator API: the other nodes and
    their peer principals (pinned), the links and QKD modules a node takes part in,
    pair-ab with ``policy``, and at the stations the SAEs of ``saes`` (ID -> station)."""
    for node in nodes.values():
        with OperatorClient(node.url, pki.identity(operator), timeout=30) as ops:
            for other, role in NETWORK.items():
                if other == node.node_id:
                    continue
                ops.create("nodes", {"node_id": other, "role": role})
                ops.create(
                    "principals",
                    {
                        "principal_id": f"peer-{other}",
                        "role": "peer",
                        "cert_subject": other,
                        "cert_sha256": pki.pin(other),
                        "node_id": other,
                    },
                )
            for station, link in NETWORK_LINKS.items():
                if node.node_id in (RELAY, station):
                    ops.create("links", {"link_id": link, "relay_id": RELAY, "station_id": station})
                    ops.create(
                        "principals",
                        {
                            "principal_id": f"mod-{link}",
                            "role": "qkd-module",
                            "cert_subject": f"mod-{link}",
                            "link_id": link,
                        },
                    )
            ops.create(
                "pairs",
                {
                    "pair_id": PAIR,
                    "relay_id": RELAY,
                    "stations": list(NETWORK_LINKS),
                    "policy": dict(policy),
                },
            )
            if node.node_id != RELAY:
                for sae, station in saes.items():
                    ops.create(
                        "principals",
                        {
                            "principal_id": sae,
                            "role": "sae",
                            "cert_subject": sae,
                            "station_id": station,
                        },
                    )


def new_blocks(count: int, block_bytes: int, epsilon: float = 1e-10) -> list[LinkBlock]:
    """``count`` random link key blocks of ``block_bytes`` each (QBER 0.02)."""
    now = datetime.now(UTC)
    return [
        LinkBlock(
            block_id=str(uuid.uuid4()),
            key=os.urandom(block_bytes),
            qber=0.02,
            epsilon=epsilon,
            produced_at=now,
        )
        for _ in range(count)
    ]


def feed_links(
    nodes: Mapping[str, NodeProcess],
    pki: PkiFiles,
    blocks_per_link: int,
    *,
    block_bytes: int = 4096,
    per_request: int | None = None,
    epsilon: float = 1e-10,
    attempts: int = 20,
    backoff: float = 0.2,
    timeout: float = 60.0,
) -> int:
    """Push the same fresh random blocks to both ends of each link, ``per_request`` at a
    time (all at once if None), as the link's QKD module would (binary block records);
    blocks are made one request's worth at a time. Return the bytes pushed per link."""
    step = per_request or blocks_per_link
    for station, link in NETWORK_LINKS.items():
        module = pki.identity(f"mod-{link}")
        clients = [
            ModuleClient(
                nodes[end].url, module, attempts=attempts, backoff=backoff, timeout=timeout
            )
            for end in (RELAY, station)
        ]
        try:
            for first in range(0, blocks_per_link, step):
                batch = new_blocks(min(step, blocks_per_link - first), block_bytes, epsilon)
                for client in clients:
                    client.push_blocks(link, batch)
        finally:
            for client in clients:
                client.close()
    return blocks_per_link * block_bytes


def in_flight_bits(
    nodes: Mapping[str, NodeProcess], pki: PkiFiles, operator: str = OPERATOR
) -> int:
    """Pair key bits on their way from the relay (segments not yet confirmed)."""
    with OperatorClient(nodes[RELAY].url, pki.identity(operator), timeout=30) as ops:
        return sum(int(p["in_flight_bits"]) for p in ops.pairs()["pairs"])


def set_policy(
    nodes: Mapping[str, NodeProcess],
    pki: PkiFiles,
    policy: Mapping[str, int],
    operator: str = OPERATOR,
) -> None:
    """Give pair-ab ``policy`` at the relay (its scheduler reads it)."""
    with OperatorClient(nodes[RELAY].url, pki.identity(operator), timeout=30) as ops:
        ops.change("pairs", PAIR, {"policy": dict(policy)})
