"""A private PostgreSQL server for fault tests: its own data folder and port, so a test
can stop it (even crash it) and start it again without touching the machine's shared
server or other tests. Uses the PostgreSQL binaries installed on the machine."""

from __future__ import annotations

import contextlib
import glob
import os
import shutil
import subprocess
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import psycopg

from keystrata.loopback.processes import free_port


def _bin(name: str) -> str | None:
    found = sorted(glob.glob(f"/usr/lib/postgresql/*/bin/{name}"))
    return found[-1] if found else shutil.which(name)


def available() -> bool:
    """initdb and pg_ctl exist, and (as root) the postgres user to run them."""
    return bool(_bin("initdb") and _bin("pg_ctl")) and (
        os.geteuid() != 0 or shutil.which("runuser") is not None
    )


def _as_owner(args: list[str]) -> list[str]:
    # PostgreSQL refuses to run as root; the Debian packages provide the postgres user.
    return ["runuser", "-u", "postgres", "--", *args] if os.geteuid() == 0 else args


@dataclass
class PgCluster:
    data: Path
    port: int
    log: Path

    def url(self, database: str) -> str:
        return f"postgresql+psycopg://postgres@127.0.0.1:{self.port}/{database}"

    def _ctl(self, *args: str) -> None:
        subprocess.run(
            _as_owner([str(_bin("pg_ctl")), "-D", str(self.data), *args]),
            check=True,
            capture_output=True,
            timeout=60,
        )

    def start(self) -> None:
        opts = f"-p {self.port} -c listen_addresses=127.0.0.1 -k {self.data}"
        self._ctl("-l", str(self.log), "-o", opts, "-w", "start")

    def stop(self, mode: str = "immediate") -> None:
        """``immediate`` is a crash for the clients: connections drop mid-transaction."""
        self._ctl("-m", mode, "-w", "stop")

    def create_database(self, name: str) -> str:
        with psycopg.connect(
            f"host=127.0.0.1 port={self.port} user=postgres dbname=postgres", autocommit=True
        ) as conn:
            conn.execute(f'CREATE DATABASE "{name}"')
        return self.url(name)

    def wait_ready(self, timeout: float = 30) -> None:
        deadline = time.monotonic() + timeout
        while True:
            try:
                psycopg.connect(
                    f"host=127.0.0.1 port={self.port} user=postgres dbname=postgres",
                    connect_timeout=2,
                ).close()
                return
            except psycopg.OperationalError:
                if time.monotonic() > deadline:
                    raise
                time.sleep(0.2)


@contextmanager
def private_postgres() -> Iterator[PgCluster]:
    """Initialise and start a server in a new folder under /tmp (pytest's folders are
    not reachable for the postgres user), trust auth on 127.0.0.1 only; stop it and
    remove its files afterwards."""
    folder = Path(tempfile.mkdtemp(prefix="keystrata-pg-"))
    data = folder / "pgdata"
    data.mkdir()
    if os.geteuid() == 0:
        shutil.chown(folder, "postgres")
        shutil.chown(data, "postgres")
    subprocess.run(
        _as_owner([str(_bin("initdb")), "-D", str(data), "-A", "trust", "-U", "postgres"]),
        check=True,
        capture_output=True,
        timeout=120,
    )
    cluster = PgCluster(data=data, port=free_port(), log=folder / "postgres.log")
    cluster.start()
    try:
        cluster.wait_ready()
        yield cluster
    finally:
        with contextlib.suppress(subprocess.CalledProcessError):  # stopped by the test
            cluster.stop("fast")
        shutil.rmtree(folder, ignore_errors=True)
