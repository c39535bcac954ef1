"""The network under load: its own PKI and PostgreSQL databases, made at run time, three
``keystrata serve`` processes on loopback ports, provisioned through the operator API,
and link key pushed by QKD module clients until enough pair key is ready."""

from __future__ import annotations

import os
import signal
import socket
import ssl
import subprocess
import sys
import time
import uuid
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import httpx
import psycopg

from keystrata.crypto.kek import write_new_kek
from keystrata.crypto.pki import PkiDir, fingerprint_sha256
from keystrata_client import LinkBlock, ModuleClient, OperatorClient, TlsIdentity

PAIR = "pair-ab"
NODES = {"relay-1": "relay", "station-a": "station", "station-b": "station"}
LINKS = {"station-a": "link-a", "station-b": "link-b"}
OPERATOR = "ops-load"
BLOCK_BYTES = 64 * 1024
BLOCKS_PER_PUSH = 16
#: Connections per worker process: up to twice this with overflow, so the five processes
#: (two stations of two workers, one relay) stay within 40 of PostgreSQL's default 100.
POOL_SIZE = 4


@dataclass(frozen=True)
class Pki:
    """Certificates of the run: the CA, one per node, one per client."""

    dir: Path

    @property
    def ca(self) -> Path:
        return self.dir / "ca.crt"

    def identity(self, name: str) -> TlsIdentity:
        return TlsIdentity(ca=self.ca, cert=self.dir / f"{name}.crt", key=self.dir / f"{name}.key")


def make_pki(folder: Path, clients: dict[str, str]) -> Pki:
    """Make a CA, a certificate per node and per client (name -> role), at run time."""
    pki = PkiDir(folder)
    pki.init("keystrata load test CA")
    for node in NODES:
        pki.issue_node(node, ["127.0.0.1", "localhost"])
    for name, role in clients.items():
        pki.issue_client(name, role)
    return Pki(pki.path)


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


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class NodeProcess:
    node_id: str
    config: Path
    port: int
    log: Path
    proc: subprocess.Popen[bytes] | None = field(default=None, repr=False)

    @property
    def url(self) -> str:
        return f"https://127.0.0.1:{self.port}"

    def launch(self) -> None:
        with open(self.log, "ab") as log:
            # The project's own server, started by path from this interpreter.
            self.proc = subprocess.Popen(  # noqa: S603
                [sys.executable, "-m", "keystrata", "serve", "--config", str(self.config)],
                stdout=log,
                stderr=subprocess.STDOUT,
            )

    def wait_ready(self, operator: TlsIdentity, timeout: float = 60) -> None:
        assert self.proc is not None
        deadline = time.monotonic() + timeout
        context = operator.ssl_context()
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"{self.node_id} exited; see {self.log}")
            try:
                httpx.get(self.url + "/api/v1/node", verify=context, timeout=2)
                return
            except (httpx.HTTPError, ssl.SSLError):
                time.sleep(0.2)
        raise RuntimeError(f"{self.node_id} did not answer within {timeout} s; see {self.log}")

    def stop(self) -> None:
        if self.proc is None or self.proc.poll() is not None:
            return
        self.proc.send_signal(signal.SIGTERM)
        try:
            self.proc.wait(20)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(10)


def _config(
    folder: Path, node_id: str, role: str, db_url: str, pki: Pki, port: int, extra: str
) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    kek = folder / f"{node_id}.kek"
    write_new_kek(kek)
    path = folder / f"{node_id}.toml"
    path.write_text(f"""[node]
id = "{node_id}"
role = "{role}"

[server]
host = "127.0.0.1"
port = {port}
workers = {2 if role == "station" else 1}

[tls]
ca = "{pki.ca}"
cert = "{pki.dir / f"{node_id}.crt"}"
key = "{pki.dir / f"{node_id}.key"}"

[database]
url = "{db_url}"
pool_size = {POOL_SIZE}

[kek]
file = "{kek}"
{extra}""")
    return path


def start_nodes(folder: Path, pki: Pki, db_urls: dict[str, str]) -> dict[str, NodeProcess]:
    """Initialise and start the relay (one worker) and the stations (two workers each),
    each knowing the others as ``[[peers]]``; return once every node answers."""
    ports = {n: free_port() for n in NODES}
    nodes: dict[str, NodeProcess] = {}
    for node_id, role in NODES.items():
        peers = "".join(
            f'\n[[peers]]\nid = "{p}"\nurl = "https://127.0.0.1:{port}"\n'
            for p, port in ports.items()
            if p != node_id
        )
        relay = "\n[relay]\ncycle_seconds = 0.5\n" if role == "relay" else ""
        config = _config(
            folder / node_id, node_id, role, db_urls[node_id], pki, ports[node_id], relay + peers
        )
        command = [sys.executable, "-m", "keystrata", "node", "init", "--config", str(config)]
        command += ["--operator-subject", OPERATOR, "--operator-id", OPERATOR]
        command += ["--operator-cert", str(pki.dir / f"{OPERATOR}.crt")]
        init = subprocess.run(command, capture_output=True, text=True, timeout=120)  # noqa: S603
        if init.returncode != 0:
            raise RuntimeError(f"node init of {node_id} failed:\n{init.stdout}{init.stderr}")
        nodes[node_id] = NodeProcess(node_id, config, ports[node_id], folder / f"{node_id}.log")
    for node in nodes.values():
        node.launch()
    for node in nodes.values():
        node.wait_ready(pki.identity(OPERATOR))
    return nodes


def provision(
    nodes: dict[str, NodeProcess], pki: Pki, saes: dict[str, str], policy: dict[str, Any]
) -> None:
    """Describe the network on every node through the operator API: nodes, peers, links,
    QKD modules, the pair with ``policy``, and the SAEs (name -> station) at the stations."""
    for node in nodes.values():
        with OperatorClient(node.url, pki.identity(OPERATOR)) as ops:
            for other, role in NODES.items():
                if other == node.node_id:
                    continue
                ops.create("nodes", {"node_id": other, "role": role})
                ops.create(
                    "principals",
                    {
                        "principal_id": f"peer-{other}",
                        "role": "peer",
                        "cert_subject": other,
                        "cert_sha256": fingerprint_sha256((pki.dir / f"{other}.crt").read_bytes()),
                        "node_id": other,
                    },
                )
            for station, link in LINKS.items():
                if node.node_id in ("relay-1", station):
                    ops.create(
                        "links", {"link_id": link, "relay_id": "relay-1", "station_id": station}
                    )
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
                    "relay_id": "relay-1",
                    "stations": list(LINKS),
                    "policy": policy,
                },
            )
            if node.node_id != "relay-1":
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


def feed_links(nodes: dict[str, NodeProcess], pki: Pki, bytes_per_link: int) -> int:
    """Push the same random blocks to both ends of each link, as its QKD module would
    (binary block records); return the bytes pushed per link."""
    blocks = max(1, -(-bytes_per_link // BLOCK_BYTES))
    for station, link in LINKS.items():
        module = pki.identity(f"mod-{link}")
        clients = [ModuleClient(nodes[end].url, module, timeout=60) for end in ("relay-1", station)]
        try:
            for first in range(0, blocks, BLOCKS_PER_PUSH):
                now = datetime.now(UTC)
                batch = [
                    LinkBlock(str(uuid.uuid4()), os.urandom(BLOCK_BYTES), 0.02, 1e-12, now)
                    for _ in range(min(BLOCKS_PER_PUSH, blocks - first))
                ]
                for client in clients:
                    client.push_blocks(link, batch)
        finally:
            for client in clients:
                client.close()
    return blocks * BLOCK_BYTES


def ready_keys(station: NodeProcess, pki: Pki, master: str, slave: str) -> int:
    """Keys of the default size that ``master`` could take now (ETSI Get status)."""
    with httpx.Client(verify=pki.identity(master).ssl_context(), timeout=10) as client:
        r = client.get(f"{station.url}/api/v1/keys/{slave}/status")
        r.raise_for_status()
        return int(r.json()["stored_key_count"])


def delivery_counts(node: NodeProcess, pki: Pki) -> dict[str, int]:
    """The station's own accounting for the pair (GET /api/v1/deliveries); it reads
    every allocation and refusal, so it is given time after a long run."""
    with OperatorClient(node.url, pki.identity(OPERATOR), timeout=300) as ops:
        answer = ops.deliveries()
    for pair in answer["pairs"]:
        if pair["pair_id"] == PAIR:
            return {k: int(pair[k]["keys"]) for k in ("to_masters", "to_slaves", "waiting")}
    return {"to_masters": 0, "to_slaves": 0, "waiting": 0}
