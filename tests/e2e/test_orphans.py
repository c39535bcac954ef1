"""Node processes started by the loopback harness (tests, the demo, benchmarks, the load
test) run in sessions of their own, so that a terminal's Ctrl-C reaches the harness
alone. When the harness itself dies without stopping them (SIGKILL, a crash), they must
not stay behind: each stops by itself once its parent is gone."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from keystrata.loopback.pki import PkiFiles

#: A harness: starts one station (``workers`` of argv[4]) with the loopback harness,
#: prints its process ID, waits.
HARNESS = r"""
import shutil, sys, time
from pathlib import Path
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import prepare_node

base, pki = Path(sys.argv[1]), PkiFiles(Path(sys.argv[2]))
shutil.copy(sys.argv[3], base / "station-a.db")
db = f"sqlite:///{base}/station-a.db"
workers = f"workers = {sys.argv[4]}\n"
node = prepare_node(base / "station-a", pki, "station-a", "station", db, server_extra=workers)
node.start(pki)
print(node.proc.pid, flush=True)
time.sleep(600)
"""


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    # A zombie has ended; only its exit status is left for its (new) parent to read.
    stat = Path(f"/proc/{pid}/stat").read_text()
    return stat.rsplit(")", 1)[1].split()[0] != "Z"


def _children(pid: int) -> list[int]:
    found = []
    for task in Path(f"/proc/{pid}/task").iterdir():
        found += [int(c) for c in (task / "children").read_text().split()]
    return found


@pytest.mark.parametrize("workers", [1, 2])
def test_a_node_stops_when_its_harness_is_killed(
    tmp_path: Path, pki: PkiFiles, sqlite_template: Path, workers: int
) -> None:
    args = [str(tmp_path), str(pki.dir), str(sqlite_template), str(workers)]
    harness = subprocess.Popen(
        [sys.executable, "-c", HARNESS, *args], stdout=subprocess.PIPE, text=True
    )
    node_pid = 0
    try:
        assert harness.stdout is not None
        node_pid = int(harness.stdout.readline())
        assert _alive(node_pid)
        # Its workers (uvicorn's, when there are several) go with it.
        processes = [node_pid, *_children(node_pid)]
        assert len(processes) >= workers
        harness.send_signal(signal.SIGKILL)
        harness.wait(10)
        deadline = time.monotonic() + 20
        while any(_alive(p) for p in processes) and time.monotonic() < deadline:
            time.sleep(0.2)
        assert not [p for p in processes if _alive(p)], "the node outlived its harness"
        log = (tmp_path / "station-a" / "station-a.log").read_text()
        assert "its parent process is gone; stopping" in log, log
    finally:
        if harness.poll() is None:
            harness.kill()
        if node_pid and _alive(node_pid):
            os.kill(node_pid, signal.SIGKILL)
        if harness.stdout is not None:
            harness.stdout.close()
