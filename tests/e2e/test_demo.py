"""The demo as a person runs it: `keystrata demo --duration S --workdir DIR` exits 0, and
while it runs, its manifest is enough to call the operator API with curl; Ctrl-C at the
terminal stops it with its summary, and a second one at once; its screen fits the
terminal (80 and 120 columns, 24 lines); the encryptor configuration it writes works
with `keystrata-encryptors`, and the README's SDK example runs against it."""

from __future__ import annotations

import contextlib
import io
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from keystrata.loopback.processes import run_cli

REPO = Path(__file__).resolve().parents[2]
#: The three pairs of the demo's scenario, as the screen names them.
PAIR_ROWS = ("karsvik-tollmere", "brenhaven-karsvik", "brenhaven-tollmere")
#: What rich prints where it cuts a cell, and the ASCII form of it.
CUT_MARKS = ("\u2026", "...")


class Demo:
    """`keystrata demo` started as a terminal starts a job: in a process group of its
    own, so that a terminal's Ctrl-C is SIGINT to that whole group. Output is read by a
    thread as it comes; the terminal's size is given as COLUMNS and LINES."""

    def __init__(self, workdir: Path, duration: float, columns: int, lines: int = 24) -> None:
        self.workdir = workdir
        self.lines: list[str] = []
        env = {**os.environ, "COLUMNS": str(columns), "LINES": str(lines)}
        argv = ["demo", "--duration", str(duration), "--workdir", str(workdir)]
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "keystrata", *argv],
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            stdin=subprocess.DEVNULL,
            text=True,
            env=env,
            process_group=0,
        )
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            self.lines.append(line.rstrip("\n"))

    @property
    def output(self) -> str:
        return "\n".join(self.lines)

    def wait_for(self, pattern: str, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        while not re.search(pattern, self.output):
            assert self.proc.poll() is None, f"demo exited {self.proc.returncode}:\n{self.output}"
            assert time.monotonic() < deadline, f"no {pattern!r} in:\n{self.output}"
            time.sleep(0.2)

    def interrupt(self) -> None:
        """Ctrl-C at the terminal: SIGINT to the demo's whole process group."""
        os.killpg(self.proc.pid, signal.SIGINT)

    def wait(self, timeout: float) -> int:
        code = self.proc.wait(timeout)
        self._reader.join(10)
        return code

    def close(self) -> None:
        self._reader.join(10)
        if self.proc.stdout is not None:
            self.proc.stdout.close()

    def kill(self) -> None:
        """End the demo and any node it left (they run in sessions of their own)."""
        if self.proc.poll() is None:
            os.killpg(self.proc.pid, signal.SIGKILL)
            self.proc.wait()
        for pid in _serving(self.workdir):
            with contextlib.suppress(ProcessLookupError):
                os.kill(pid, signal.SIGKILL)
        self.close()


def _serving(workdir: Path) -> list[int]:
    """Process IDs of `keystrata serve` processes whose configuration is in ``workdir``."""
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            argv = (entry / "cmdline").read_bytes().decode(errors="replace").split("\0")
        except OSError:
            continue  # ended meanwhile
        if "serve" in argv and any(str(workdir) in a for a in argv):
            found.append(int(entry.name))
    return found


def _screens(lines: list[str]) -> list[list[str]]:
    """The live screens the demo printed (without a terminal it prints one every five
    seconds): from the headline to the last encryptor row."""
    screens = []
    for i, line in enumerate(lines):
        if not (line.startswith("Lowmarch Quantum Grid: ") or line.startswith("final levels")):
            continue
        rules, end = 0, i + 1
        while end < len(lines) and rules < 3:
            rules += lines[end].startswith("\u2500")
            end += 1
        while end < len(lines) and " -> " in lines[end]:
            end += 1
        screens.append(lines[i:end])
    return screens


def _check_screens(lines: list[str], columns: int, height: int = 24) -> list[list[str]]:
    """Every screen fits ``columns`` x ``height``, cuts no cell and shows every pair."""
    screens = _screens(lines)
    assert screens, "\n".join(lines)
    for screen in screens:
        text = "\n".join(screen)
        assert len(screen) <= height, text
        assert max(len(line) for line in screen) <= columns, text
        for mark in CUT_MARKS:
            assert mark not in text, text
        rows = [line.split()[0] for line in screen if line.split()]
        for pair in PAIR_ROWS:
            assert pair in rows, text
    return screens


def _wait_for_manifest(workdir: Path, demo: Demo, timeout: float) -> dict:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        assert demo.proc.poll() is None, demo.output
        path = workdir / "demo.json"
        if path.exists():
            try:
                return dict(json.loads(path.read_text()))
            except ValueError:
                pass  # being written
        time.sleep(0.2)
    raise AssertionError("demo.json did not appear")


@pytest.mark.skipif(shutil.which("curl") is None, reason="curl is not installed")
def test_demo_runs_and_its_manifest_reaches_the_operator_api(tmp_path: Path) -> None:
    workdir = tmp_path / "demo"
    demo = Demo(workdir, duration=12, columns=120)
    try:
        manifest = _wait_for_manifest(workdir, demo, 60)
        assert {n["role"] for n in manifest["nodes"]} == {"relay", "station"}
        assert len(manifest["nodes"]) == 4 and len(manifest["pairs"]) == 3
        for p in manifest["principals"]:
            assert (workdir / p["cert"]).is_file() and (workdir / p["key"]).is_file()
            assert not Path(p["cert"]).is_absolute()
            if p["role"] == "sae":
                assert p["station"] in {n["id"] for n in manifest["nodes"]}
        operator = next(p for p in manifest["principals"] if p["role"] == "operator")
        relay = next(n for n in manifest["nodes"] if n["role"] == "relay")
        deadline = time.monotonic() + 30
        while True:
            out = subprocess.run(
                [
                    "curl",
                    "-sS",
                    "--fail",
                    "--cacert",
                    manifest["ca"],
                    "--cert",
                    operator["cert"],
                    "--key",
                    operator["key"],
                    relay["url"] + "/api/v1/links/pools",
                ],
                cwd=workdir,
                capture_output=True,
                text=True,
                timeout=30,
            )
            # The nodes answer before the demo has provisioned the links; wait for them.
            ready = out.returncode == 0 and len(json.loads(out.stdout)["pools"]) == 3
            if ready or time.monotonic() > deadline:
                break
            time.sleep(0.2)
        assert out.returncode == 0, out.stderr
        pools = json.loads(out.stdout)
        assert pools["node_id"] == relay["id"]
        assert len(pools["pools"]) == 3
        code = demo.wait(90)
    finally:
        demo.kill()
    output = demo.output
    assert code == 0, output
    assert "used no link byte twice" in output
    assert "all matching" in output  # encryptor pairs: zero mismatches (else exit 1)
    assert re.search(r"\bran 1\d s: the emulators drained", output), output
    # At 120 columns the links table keeps every column, short sky cells at most.
    screens = _check_screens(demo.lines, columns=120)
    live = [s for s in screens if s[0].startswith("Lowmarch")]
    assert live and all("QBER" in "\n".join(s) and "relay pool" in "\n".join(s) for s in live)
    assert _serving(workdir) == []
    # Read both stations of every pair and every relay record ourselves.
    from keystrata.demo.verify import check_network

    configs = {n["id"]: workdir / n["config"] for n in manifest["nodes"]}
    check = check_network(
        configs[relay["id"]], {n: c for n, c in configs.items() if n != relay["id"]}
    )
    assert check.problems == []
    assert check.relay_ops > 0 and check.segments_ready_both > 0
    for pair in manifest["pairs"]:
        assert _ready_bits(workdir, configs, pair["id"], pair["stations"]) > 0, pair


def _day_of_sky(workdir: Path, nodes: list) -> list[dict]:
    """LinkStats of the demo's links as its link emulator fills them (the physical link
    model of each link, from the demo's own link specs), every two hours of its day."""
    from datetime import UTC, datetime

    from keystrata.demo.run import SKY_START, link_specs
    from keystrata_client.emulators import EndStats, LinkStats
    from keystrata_client.emulators.physical import rate_model

    specs = link_specs(workdir, nodes)
    start = SKY_START.timestamp()
    models = {s.link_id: rate_model(s.model, seed=s.seed, start=start) for s in specs}
    day = []
    for hour in range(0, 24, 2):
        t = start + hour * 3600.0
        stats = {}
        for spec in specs:
            state = models[spec.link_id].state_at(t)
            stats[spec.link_id] = LinkStats(
                spec.link_id,
                relay=EndStats(spec.relay_url),
                station=EndStats(spec.station_url),
                mode="physical",
                rate_bps=state.rate_bps,
                planned_rate_bps=state.planned_rate_bps,
                planned_qber=state.planned_qber,
                weather=state.weather.value,
                on_station=state.on_station,
                sun_elevation_deg=state.sun_elevation_deg,
                emulated_at=datetime.fromtimestamp(t, UTC),
            )
        day.append(stats)
    return day


def _render_real_state(workdir: Path, encryptor_rows: list[dict]) -> None:
    """The demo's screen rendered by rich's recording console at 80 and 120 columns and
    24 lines, from real demo state: pools and pairs read from the running nodes as the
    demo reads them, the counts of a real `keystrata-encryptors` run, and the link
    model's sky through a whole day."""
    from rich.console import Console

    from keystrata.demo.provision import operator_identity
    from keystrata.demo.run import read_nodes
    from keystrata.demo.view import ObservedRates, screen
    from keystrata.demo.workdir import DemoNode
    from keystrata_client.emulators.encryptors import PairStats

    manifest = json.loads((workdir / "demo.json").read_text())
    nodes = [
        DemoNode(n["id"], n["role"], int(n["url"].rsplit(":", 1)[1]), workdir / n["config"])
        for n in manifest["nodes"]
    ]
    observed = ObservedRates()
    for _ in range(2):
        snap = read_nodes(nodes, operator_identity(workdir), [], time.monotonic())
        observed.add(snap)
        time.sleep(1)
    assert len(snap.relay_pairs) == 3 and len(snap.station_pairs) == 3
    fields = set(PairStats.__dataclass_fields__)
    encryptors = {
        row["name"]: PairStats(**{k: v for k, v in row.items() if k in fields})
        for row in encryptor_rows
    }
    for links in _day_of_sky(workdir, nodes):
        for width in (80, 120):
            console = Console(width=width, height=24, record=True, file=io.StringIO())
            headline = "Lowmarch Quantum Grid: sky over Lowmarch 12:00; Ctrl-C stops, audits"
            console.print(screen(headline, snap, links, encryptors, observed))
            lines = console.export_text().splitlines()
            text = "\n".join(lines)
            assert len(lines) <= 24, text
            assert max(len(line) for line in lines) <= width, text
            for mark in CUT_MARKS:
                assert mark not in text, text
            starts = [line.split()[0] for line in lines if line.split()]
            assert all(pair in starts for pair in PAIR_ROWS), text
            assert sum(" -> " in line for line in lines) == 6, text


def _readme_sdk_example(workdir: Path) -> str:
    """The README's SDK example, pointed at ``workdir`` instead of ``demo-work``."""
    readme = (REPO / "README.md").read_text()
    section = readme.split("## Encryptors: the emulator and the SDK", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```python\n(.*?)```", section, flags=re.DOTALL)
    assert len(blocks) == 1, "the README's encryptor section has one Python example"
    code = blocks[0]
    assert 'Path("demo-work")' in code
    return code.replace('Path("demo-work")', f"Path({str(workdir)!r})")


def _run_readme_example(workdir: Path) -> subprocess.CompletedProcess[str]:
    """Run the README's example as a reader would, in a fresh interpreter; a 503 (no
    pair key ready at that instant: the demo's own encryptors use it too) is tried
    again, as the README says."""
    code = _readme_sdk_example(workdir)
    for _ in range(10):
        done = subprocess.run(
            [sys.executable, "-c", code], capture_output=True, text=True, timeout=60
        )
        if done.returncode == 0 or "503" not in done.stderr:
            return done
        time.sleep(1)
    return done


def test_ctrl_c_stops_the_demo_with_its_summary_on_an_80_column_terminal(
    tmp_path: Path,
) -> None:
    """Ctrl-C at the terminal (SIGINT to the demo's whole process group, as a terminal
    sends it) reaches the demo alone: the nodes stay up while it drains and audits, then
    it prints its summary, stops them and exits 0. Meanwhile the encryptor configuration
    it wrote works with `keystrata-encryptors`, and the README's SDK example runs."""
    workdir = tmp_path / "demo"
    demo = Demo(workdir, duration=600, columns=80)
    try:
        demo.wait_for(r"Lowmarch Quantum Grid: sky over Lowmarch", 120)
        config = workdir / "encryptors.toml"
        assert f"encryptor pairs: {config}" in demo.output
        # The written configuration, as a person would use it from another shell.
        script = Path(sys.executable).with_name("keystrata-encryptors")
        emulated = subprocess.run(
            [str(script), "--config", str(config), "--rekeys", "2", "--json"],
            capture_output=True,
            text=True,
            timeout=120,
        )
        assert emulated.returncode == 0, emulated.stdout + emulated.stderr
        final = [json.loads(line) for line in emulated.stdout.splitlines()]
        final = [row for row in final if row["final"]]
        assert len(final) == 6  # every encryptor pair of the demo
        assert all(row["mismatches"] == 0 and row["keys_delivered"] > 0 for row in final)
        example = _run_readme_example(workdir)
        assert example.returncode == 0, example.stderr
        key_id, digest = example.stdout.split()
        assert re.fullmatch(r"[0-9a-f-]{36}", key_id) and re.fullmatch(r"[0-9a-f]{64}", digest)
        _render_real_state(workdir, final)
        # The network the demo built is the one its description file says.
        checked = run_cli("network", "check", str(workdir / "network.toml"), check=False)
        assert checked.returncode == 0, checked.stdout + checked.stderr
        assert checked.stdout.count(": in line (") == 4, checked.stdout
        nodes = _serving(workdir)
        assert len(nodes) == 4
        demo.interrupt()
        demo.wait_for(r"stopping; the emulators drain", 30)
        assert sorted(_serving(workdir)) == sorted(nodes)  # untouched by the Ctrl-C
        code = demo.wait(180)
    finally:
        demo.kill()
    output = demo.output
    assert "Traceback" not in output, output
    assert code == 0, output
    assert re.search(r"stopped by Ctrl-C after \d+ s: the emulators drained", output), output
    assert "ok: " in output and "every pair reconciles" in output, output
    assert _serving(workdir) == []
    # Each ledger's root is shown as the ledger API gives it: the start of the Base64
    # root_hash of the export's checkpoint (no other encoding anywhere).
    for node in ("relay-vela", "karsvik", "tollmere", "brenhaven"):
        root = json.loads((workdir / "audit" / node / "checkpoint.json").read_text())["root_hash"]
        assert re.search(rf"{node}\s+\d+\s+{re.escape(root[:12])}\s+yes", output), output
    _check_screens(demo.lines, columns=80)
    # The summary's tables fit too (their cells wrap at spaces rather than being cut).
    summary = output.split("final levels", 1)[1]
    for mark in CUT_MARKS:
        assert mark not in summary, summary
    for line in summary.splitlines():
        assert len(line) <= 80, line


def test_a_second_ctrl_c_stops_the_demo_at_once(tmp_path: Path) -> None:
    workdir = tmp_path / "demo"
    demo = Demo(workdir, duration=600, columns=80)
    try:
        demo.wait_for(r"Lowmarch Quantum Grid: sky over Lowmarch", 120)
        demo.interrupt()
        demo.wait_for(r"stopping; the emulators drain", 30)
        demo.interrupt()
        started = time.monotonic()
        code = demo.wait(60)
        took = time.monotonic() - started
    finally:
        demo.kill()
    output = demo.output
    assert "Traceback" not in output, output
    assert code == 128 + signal.SIGINT, output
    assert "stopped at once (Ctrl-C): the nodes are stopped" in output
    assert "ok: " not in output
    assert took < 30, took  # stopping the nodes, not draining and auditing
    assert _serving(workdir) == []


def _ready_bits(workdir: Path, configs: dict[str, Path], pair_id: str, stations: list[str]) -> int:
    """Ready key of a pair, the same at both its stations (segment by segment)."""
    from sqlalchemy import select

    from keystrata.config import load_settings
    from keystrata.storage.db import Database
    from keystrata.storage.models import PairSegment

    seen = []
    for station in stations:
        settings = load_settings(configs[station], env={})
        db = Database.from_url(settings.database.url)
        try:
            with db.read() as s:
                seen.append(
                    {
                        r.segment_id: r.length
                        for r in s.execute(
                            select(PairSegment).where(
                                PairSegment.pair_id == pair_id, PairSegment.state == "ready"
                            )
                        ).scalars()
                    }
                )
        finally:
            db.dispose()
    both = seen[0].keys() & seen[1].keys()
    return 8 * sum(seen[0][s] for s in both)
