"""Node processes on loopback: `keystrata serve` on free 127.0.0.1 ports, started, waited
for until they answer, stopped (SIGTERM, or SIGKILL as the crash tests do).

Each node runs in a session of its own, so a Ctrl-C at the terminal (SIGINT to the
terminal's foreground process group) reaches only the program that started the nodes,
which then stops them when it is ready to (the demo first drains and audits them)."""

from __future__ import annotations

import os
import signal
import socket
import ssl
import subprocess
import sys
import time
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path

import httpx

from keystrata.config import PARENT_ENV
from keystrata.loopback.configs import FAST_SQLITE, write_config
from keystrata.loopback.pki import PkiFiles

#: The command line of this interpreter's keystrata CLI.
KEYSTRATA = [sys.executable, "-m", "keystrata"]
#: The client certificate that asks a starting node whether it answers.
OPERATOR = "ops-ada"


def free_port() -> int:
    """A TCP port free on 127.0.0.1 right now."""
    return free_ports(1)[0]


def free_ports(n: int) -> list[int]:
    """``n`` distinct TCP ports free on 127.0.0.1 right now."""
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


def run_cli(
    *args: str, check: bool = True, env: dict[str, str] | None = None, timeout: float = 60
) -> subprocess.CompletedProcess[str]:
    """Run ``keystrata *args``; return what it printed and its exit status.

    Raises:
        RuntimeError: ``check`` and the command failed.
    """
    # The project's own CLI, started from this interpreter with fixed arguments.
    result = subprocess.run(  # noqa: S603
        [*KEYSTRATA, *args],
        capture_output=True,
        text=True,
        timeout=timeout,
        env={**os.environ, **(env or {})},
    )
    if check and result.returncode != 0:
        raise RuntimeError(f"keystrata {' '.join(args)} failed:\n{result.stdout}\n{result.stderr}")
    return result


@dataclass
class NodeProcess:
    """One node's `keystrata serve` process, its configuration, port and log file."""

    node_id: str
    config: Path
    port: int
    log: Path
    #: Seconds :meth:`start` waits for the node to answer.
    start_timeout: float = 20.0
    proc: subprocess.Popen[bytes] | None = field(default=None, repr=False)

    @property
    def url(self) -> str:
        return f"https://127.0.0.1:{self.port}"

    @property
    def running(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def launch(self) -> NodeProcess:
        """Start the process without waiting for it to answer."""
        self.log.parent.mkdir(parents=True, exist_ok=True)
        with open(self.log, "ab") as log:
            # The project's own server, started from this interpreter with fixed arguments.
            self.proc = subprocess.Popen(  # noqa: S603
                [*KEYSTRATA, "serve", "--config", str(self.config)],
                stdout=log,
                stderr=subprocess.STDOUT,
                stdin=subprocess.DEVNULL,
                # Its own session, so that a terminal's Ctrl-C reaches the harness alone;
                # and it stops by itself should the harness die without stopping it.
                start_new_session=True,
                env={**os.environ, PARENT_ENV: str(os.getpid())},
            )
        return self

    def start(
        self, pki: PkiFiles, timeout: float | None = None, *, client: str = OPERATOR
    ) -> NodeProcess:
        """Start the process (unless launched already) and wait until it answers a
        request from ``client`` (any answer: the TLS handshake and HTTP work).

        Raises:
            RuntimeError: the process exited, or did not answer within ``timeout``
                seconds (default :attr:`start_timeout`; it is then killed).
        """
        if self.proc is None:
            self.launch()
        assert self.proc is not None
        ctx = ssl.create_default_context(cafile=str(pki.ca))
        ctx.load_cert_chain(str(pki.cert(client)), str(pki.key(client)))
        wait = self.start_timeout if timeout is None else timeout
        deadline = time.monotonic() + wait
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                self.proc = None
                raise RuntimeError(f"{self.node_id} exited:\n{self.log.read_text()}")
            try:
                httpx.get(self.url + "/api/v1/node", verify=ctx, timeout=1)
                return self
            except (httpx.HTTPError, ssl.SSLError):
                time.sleep(0.1)
        self.kill()
        raise RuntimeError(
            f"{self.node_id} did not answer in {wait:.0f} s:\n{self.log.read_text()}"
        )

    def send(self, sig: int = signal.SIGTERM) -> None:
        """Send ``sig`` to the running process, without waiting."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(sig)

    def stop(self, sig: int = signal.SIGTERM, grace: float = 10) -> None:
        """Send ``sig`` and wait for the process to end (SIGKILL after ``grace`` s)."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(sig)
            try:
                self.proc.wait(grace)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)
        self.proc = None

    def kill(self) -> None:
        """SIGKILL the process and wait for it: a crash, as far as the node can tell."""
        self.stop(signal.SIGKILL)


def prepare_node(
    folder: Path,
    pki: PkiFiles,
    node_id: str,
    role: str,
    db_url: str,
    operator: str = OPERATOR,
    *,
    port: int | None = None,
    extra: str = "",
    server_extra: str = "",
    database_extra: str = FAST_SQLITE,
) -> NodeProcess:
    """Write the node's configuration into ``folder`` and initialise its database with
    ``keystrata node init`` (first operator: certificate ``operator``); return the node,
    not started."""
    port = port or free_port()
    config = write_config(
        folder,
        node_id=node_id,
        role=role,
        db_url=db_url,
        pki=pki,
        port=port,
        extra=extra,
        server_extra=server_extra,
        database_extra=database_extra,
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
        timeout=120,
    )
    return NodeProcess(node_id=node_id, config=config, port=port, log=folder / f"{node_id}.log")


def start_all(nodes: Iterable[NodeProcess], pki: PkiFiles, *, client: str = OPERATOR) -> None:
    """Start several nodes at once and wait until each answers; if one does not, stop
    them all (no node outlives a failed start)."""
    nodes = list(nodes)
    try:
        for node in nodes:
            node.launch()
        for node in nodes:
            node.start(pki, client=client)
    except BaseException:
        stop_all(nodes)
        raise


def stop_all(nodes: Iterable[NodeProcess]) -> None:
    """Stop several nodes at once (SIGTERM to all, then wait for each)."""
    nodes = list(nodes)
    for node in nodes:
        node.send(signal.SIGTERM)
    for node in nodes:
        node.stop()
