"""What every benchmark shares: the figure record, a run's workspace (temporary folder,
PKI, PostgreSQL databases it made), percentiles and process memory readings.

Everything a run makes lives under one temporary folder and in PostgreSQL databases
named ``ksbench_<pid>_<n>``; :class:`Workspace` removes both when the run ends, whatever
happened.
"""

from __future__ import annotations

import contextlib
import itertools
import math
import os
import shutil
import signal
import tempfile
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from keystrata.loopback.network import CLIENTS, NETWORK
from keystrata.loopback.pki import PkiFiles, make_pki

REPO = Path(__file__).resolve().parent.parent
PG_URL = os.environ.get(
    "KEYSTRATA_TEST_PG_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/postgres"
)
#: SQLite durability of every node and ceiling in the run: by default the production
#: setting (deploy/examples/relay.toml), so each commit waits for the disk;
#: ``python -m bench --sqlite-synchronous NORMAL`` shows what that wait costs.
SQLITE_SYNCHRONOUS = "FULL"


@dataclass(frozen=True)
class Figure:
    """One measured figure, optionally beside its ceiling measured in the same run.

    ``ratio`` is ``value / ceiling`` when there is a ceiling, else None.
    """

    name: str
    value: float
    unit: str
    ceiling: float | None = None
    note: str = ""

    @property
    def ratio(self) -> float | None:
        if self.ceiling is None or self.ceiling == 0:
            return None
        return self.value / self.ceiling

    def to_json(self) -> dict[str, Any]:
        """The record results.json holds: name, value, unit, ceiling, ratio."""
        return {
            "name": self.name,
            "value": self.value,
            "unit": self.unit,
            "ceiling": self.ceiling,
            "ratio": self.ratio,
        }


@dataclass(frozen=True)
class Target:
    """A target of the issue, checked against the figures of a run."""

    text: str
    met: bool | None  # None: the figure it needs was not measured in this run
    detail: str


def percentile(values: Sequence[float], q: float) -> float:
    """Return the ``q``-th percentile (0..100) by the nearest-rank method (common
    practice for latency reports); NaN for no values."""
    if not values:
        return math.nan
    ordered = sorted(values)
    rank = max(1, math.ceil(q / 100 * len(ordered)))
    return ordered[min(rank, len(ordered)) - 1]


def process_tree(pid: int) -> list[int]:
    """``pid`` and all its descendants (read from /proc)."""
    children: dict[int, list[int]] = {}
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/stat", encoding="ascii", errors="replace") as f:
                stat = f.read()
        except OSError:
            continue
        # The command name is in parentheses and may contain spaces: split after it.
        ppid = int(stat.rsplit(")", 1)[1].split()[1])
        children.setdefault(ppid, []).append(int(entry))
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        out.append(p)
        todo.extend(children.get(p, []))
    return out


def cpu_seconds(pid: int) -> float:
    """User and system CPU time of ``pid`` and its living descendants, in seconds (from
    /proc/<pid>/stat fields 14 and 15, in clock ticks)."""
    ticks = 0
    for p in process_tree(pid):
        try:
            with open(f"/proc/{p}/stat", encoding="ascii", errors="replace") as f:
                after_name = f.read().rsplit(")", 1)[1].split()
        except OSError:
            continue
        ticks += int(after_name[11]) + int(after_name[12])  # utime, stime
    return ticks / os.sysconf("SC_CLK_TCK")


def memory_kib(pid: int, field: str) -> int:
    """A memory field of /proc/<pid>/status in KiB (VmRSS, VmHWM); 0 if gone."""
    try:
        with open(f"/proc/{pid}/status", encoding="ascii") as f:
            for line in f:
                if line.startswith(field + ":"):
                    return int(line.split()[1])
    except OSError:
        return 0
    return 0


class Workspace:
    """A run's temporary folder, its PKI and the PostgreSQL databases it made."""

    def __init__(self) -> None:
        self.root = Path(tempfile.mkdtemp(prefix="ksbench-"))
        self._pg: list[str] = []
        self._n = itertools.count()
        self._pki: PkiFiles | None = None

    def folder(self, name: str) -> Path:
        path = self.root / f"{name}-{next(self._n)}"
        path.mkdir(parents=True)
        return path

    @property
    def pki(self) -> PkiFiles:
        """The run's PKI (the loopback network's node and client names), made on first
        use."""
        if self._pki is None:
            self._pki = make_pki(self.root / "pki", "Bench Network CA", NETWORK, CLIENTS)
        return self._pki

    def sqlite_url(self, name: str) -> str:
        return f"sqlite:///{self.folder('db')}/{name}.db"

    def pg_url(self, name: str) -> str:
        """Create an empty PostgreSQL database for this run; return its URL."""
        import psycopg

        db = f"ksbench_{os.getpid()}_{next(self._n)}_{name.replace('-', '_')}"
        with psycopg.connect(_plain(PG_URL), autocommit=True, connect_timeout=5) as admin:
            admin.execute(f'CREATE DATABASE "{db}"')
        self._pg.append(db)
        return PG_URL.rsplit("/", 1)[0] + "/" + db

    def close(self) -> None:
        """Stop any process still running from this run's folder (a node whose start
        failed half way, say), drop the databases and remove the folder."""
        stop_processes_under(self.root)
        if self._pg:
            import psycopg

            with psycopg.connect(_plain(PG_URL), autocommit=True, connect_timeout=5) as admin:
                for db in self._pg:
                    admin.execute(f'DROP DATABASE IF EXISTS "{db}" WITH (FORCE)')
            self._pg.clear()
        shutil.rmtree(self.root, ignore_errors=True)


def _processes_under(folder: Path) -> list[int]:
    """IDs of processes whose command line names a path inside ``folder``: only
    processes this run started can name its fresh temporary folder."""
    mark = str(folder) + "/"
    found = []
    for entry in os.listdir("/proc"):
        if not entry.isdigit() or int(entry) == os.getpid():
            continue
        try:
            with open(f"/proc/{entry}/cmdline", "rb") as f:
                args = f.read().decode(errors="replace").split("\0")
        except OSError:
            continue
        if any(mark in a for a in args):
            found.append(int(entry))
    return found


def stop_processes_under(folder: Path, grace: float = 15.0) -> None:
    """SIGTERM each of this run's leftover processes by ID, SIGKILL what is still
    there after ``grace`` seconds."""
    pids = _processes_under(folder)
    for pid in pids:
        with contextlib.suppress(ProcessLookupError):
            os.kill(pid, signal.SIGTERM)
    deadline = time.monotonic() + grace
    while pids and time.monotonic() < deadline:
        time.sleep(0.2)
        pids = [p for p in pids if os.path.exists(f"/proc/{p}") and not _zombie(p)]
    for pid in pids:
        with contextlib.suppress(ProcessLookupError):
            os.kill(pid, signal.SIGKILL)


def _zombie(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as f:
            return f.read().rsplit(")", 1)[1].split()[0] == "Z"
    except OSError:
        return True


def _plain(url: str) -> str:
    return url.replace("postgresql+psycopg://", "postgresql://")


def postgres_available() -> bool:
    import psycopg

    try:
        with psycopg.connect(_plain(PG_URL), autocommit=True, connect_timeout=3):
            return True
    except psycopg.OperationalError:
        return False


@contextmanager
def environment(values: dict[str, str]) -> Iterator[None]:
    """Processes started inside inherit ``values``; the environment is restored after."""
    old = {k: os.environ.get(k) for k in values}
    os.environ.update(values)
    try:
        yield
    finally:
        for k, v in old.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


@contextmanager
def workspace() -> Iterator[Workspace]:
    ws = Workspace()
    try:
        yield ws
    finally:
        ws.close()
