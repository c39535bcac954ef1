"""Start and stop the demo's node processes."""

from __future__ import annotations

import signal
import socket
import ssl
import subprocess
import sys
import time
from pathlib import Path

import httpx

from keystrata.demo.workdir import DemoNode
from keystrata_client import TlsIdentity


def free_ports(n: int) -> list[int]:
    """Return ``n`` distinct free TCP ports on 127.0.0.1."""
    sockets = []
    try:
        for _ in range(n):
            s = socket.socket()
            s.bind(("127.0.0.1", 0))
            sockets.append(s)
        return [int(s.getsockname()[1]) for s in sockets]
    finally:
        for s in sockets:
            s.close()


class NodeProcesses:
    """The running nodes; stops them all on exit."""

    def __init__(self, nodes: list[DemoNode], logs: Path) -> None:
        self.nodes = nodes
        self.logs = logs
        self.procs: dict[str, subprocess.Popen[bytes]] = {}

    def start(self) -> None:
        self.logs.mkdir(parents=True, exist_ok=True)
        for node in self.nodes:
            with open(self.logs / f"{node.node_id}.log", "ab") as log:
                self.procs[node.node_id] = subprocess.Popen(  # noqa: S603 - our own CLI
                    [sys.executable, "-m", "keystrata", "serve", "--config", str(node.config)],
                    stdout=log,
                    stderr=subprocess.STDOUT,
                )

    def wait_ready(self, identity: TlsIdentity, timeout: float = 30.0) -> None:
        """Wait until every node answers. Raises RuntimeError naming a node that died."""
        ctx = identity.ssl_context()
        deadline = time.monotonic() + timeout
        waiting = list(self.nodes)
        while waiting:
            node = waiting[0]
            if self.procs[node.node_id].poll() is not None:
                raise RuntimeError(
                    f"node {node.node_id} exited; see {self.logs / (node.node_id + '.log')}"
                )
            try:
                httpx.get(node.url + "/api/v1/node", verify=ctx, timeout=1.0)
                waiting.pop(0)
            except (httpx.HTTPError, ssl.SSLError) as exc:
                if time.monotonic() > deadline:
                    raise RuntimeError(
                        f"node {node.node_id} did not answer in {timeout:.0f} s"
                    ) from exc
                time.sleep(0.1)

    def dead(self) -> list[str]:
        return [n for n, p in self.procs.items() if p.poll() is not None]

    def stop(self) -> None:
        for proc in self.procs.values():
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
        for proc in self.procs.values():
            try:
                proc.wait(10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(5)
