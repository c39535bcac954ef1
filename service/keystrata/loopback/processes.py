"""Real node processes for end-to-end tests: `keystrata serve` on loopback ports."""

from __future__ import annotations

import os
import signal
import socket
import ssl
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx

from conftest import PkiFiles, cert_pin, write_config

KEYSTRATA = [sys.executable, "-m", "keystrata"]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def run_cli(
    *args: str, check: bool = True, env: dict[str, str] | None = None, timeout: float = 60
) -> subprocess.CompletedProcess[str]:
    result = subprocess.run(
        [*KEYSTRATA, *args],
        capture_output=True,
        text=True,
        timeout=timeout,
        env={**os.environ, **(env or {})},
    )
    if check and result.returncode != 0:
        raise AssertionError(
            f"keystrata {' '.join(args)} failed:\n{result.stdout}\n{result.stderr}"
        )
    return result


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

    def launch(self) -> NodeProcess:
        """Start the process without waiting for it to answer."""
        with open(self.log, "ab") as log:
            self.proc = subprocess.Popen(
                [*KEYSTRATA, "serve", "--config", str(self.config)],
                stdout=log,
                stderr=subprocess.STDOUT,
            )
        return self

    def start(self, pki: PkiFiles, timeout: float = 20) -> NodeProcess:
        """Start the process (unless launched already) and wait until it answers."""
        if self.proc is None:
            self.launch()
        assert self.proc is not None
        ctx = ssl.create_default_context(cafile=str(pki.ca))
        ctx.load_cert_chain(str(pki.cert("ops-ada")), str(pki.key("ops-ada")))
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                self.proc = None
                raise AssertionError(f"{self.node_id} exited:\n{self.log.read_text()}")
            try:
                httpx.get(self.url + "/api/v1/node", verify=ctx, timeout=1)
                return self
            except httpx.HTTPError:
                time.sleep(0.1)
        self.stop(signal.SIGKILL)
        raise AssertionError(f"{self.node_id} did not answer:\n{self.log.read_text()}")

    def send(self, sig: int = signal.SIGTERM) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(sig)

    def stop(self, sig: int = signal.SIGTERM) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(sig)
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)
        self.proc = None


def prepare_node(
    folder: Path,
    pki: PkiFiles,
    node_id: str,
    role: str,
    db_url: str,
    operator: str = "ops-ada",
    *,
    port: int | None = None,
    extra: str = "",
) -> NodeProcess:
    port = port or free_port()
    config = write_config(
        folder, node_id=node_id, role=role, db_url=db_url, pki=pki, port=port, extra=extra
    )
    run_cli(
        "node",
        "init",
        "--config",
        str(config),
        "--operator-subject",
        operator,
        "--operator-id",
        operator,
        "--operator-cert",
        str(pki.cert(operator)),
    )
    return NodeProcess(node_id=node_id, config=config, port=port, log=folder / f"{node_id}.log")


def start_all(nodes: list[NodeProcess], pki: PkiFiles) -> None:
    """Start several nodes at once and wait until each answers; if one does not, stop
    them all (no node outlives a failed start)."""
    try:
        for node in nodes:
            node.launch()
        for node in nodes:
            node.start(pki)
    except BaseException:
        stop_all(nodes)
        raise


def stop_all(nodes: list[NodeProcess]) -> None:
    """Stop several nodes at once (SIGTERM to all, then wait for each)."""
    for node in nodes:
        node.send(signal.SIGTERM)
    for node in nodes:
        node.stop()


#: The relay network of the end-to-end tests: a relay and two stations, one link each.
NETWORK = {"relay-1": "relay", "station-a": "station", "station-b": "station"}
NETWORK_LINKS = {"station-a": "link-a", "station-b": "link-b"}
SAES = {"sae-a1": "station-a", "sae-a2": "station-a", "sae-b1": "station-b", "sae-b2": "station-b"}


def start_network(
    folder: Path,
    pki: PkiFiles,
    db_urls: dict[str, str],
    *,
    extra: str = "",
    policy: dict[str, Any] | None = None,
    saes: bool = False,
    relay_workers: int = 1,
) -> dict[str, NodeProcess]:
    """Start relay-1, station-a and station-b as processes, each knowing the others as
    peers, and provision them through the operator API: nodes, peers, links, QKD
    modules, pair-ab (with ``policy``) and, if asked, the test SAEs at the stations."""
    from keystrata_client import OperatorClient, TlsIdentity

    ports = {n: free_port() for n in NETWORK}

    def prepare(node_id: str, role: str) -> NodeProcess:
        peers = "".join(
            f'\n[[peers]]\nid = "{p}"\nurl = "https://127.0.0.1:{port}"\n'
            for p, port in ports.items()
            if p != node_id
        )
        return prepare_node(
            folder / node_id,
            pki,
            node_id,
            role,
            db_urls[node_id],
            port=ports[node_id],
            extra=extra + peers,
        )

    # `keystrata node init` is a process of its own per node: run the three at once.
    with ThreadPoolExecutor(len(NETWORK)) as pool:
        jobs = {n: pool.submit(prepare, n, role) for n, role in NETWORK.items()}
        nodes = {n: job.result() for n, job in jobs.items()}
    if relay_workers > 1:
        relay = nodes["relay-1"].config
        relay.write_text(
            relay.read_text().replace("[server]\n", f"[server]\nworkers = {relay_workers}\n", 1)
        )
    # Nodes that started must not outlive a failed start-up or provisioning.
    try:
        start_all(list(nodes.values()), pki)
        operator = TlsIdentity(ca=pki.ca, cert=pki.cert("ops-ada"), key=pki.key("ops-ada"))
        for node in nodes.values():
            with OperatorClient(node.url, operator) as ops:
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
                            "cert_sha256": cert_pin(pki.dir, other),
                            "node_id": other,
                        },
                    )
                for station, link in NETWORK_LINKS.items():
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
                        "pair_id": "pair-ab",
                        "relay_id": "relay-1",
                        "stations": ["station-a", "station-b"],
                        "policy": policy or {},
                    },
                )
                if saes and node.node_id != "relay-1":
                    for sae, station in SAES.items():
                        ops.create(
                            "principals",
                            {
                                "principal_id": sae,
                                "role": "sae",
                                "cert_subject": sae,
                                "station_id": station,
                            },
                        )
    except BaseException:
        stop_all(list(nodes.values()))
        raise
    return nodes
