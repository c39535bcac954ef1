"""The demo as a person runs it: `keystrata demo --duration S --workdir DIR` exits 0, and
while it runs, its manifest is enough to call the operator API with curl."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest


def _wait_for_manifest(workdir: Path, proc: subprocess.Popen[str], timeout: float) -> dict:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        assert proc.poll() is None, proc.communicate()[0]
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
    proc = subprocess.Popen(
        [sys.executable, "-m", "keystrata", "demo", "--duration", "12", "--workdir", str(workdir)],
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
    )
    try:
        manifest = _wait_for_manifest(workdir, proc, 60)
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
        output, _ = proc.communicate(timeout=90)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0, output
    assert "used no link byte twice" in output
    assert "all matching" in output  # encryptor pairs: zero mismatches (else exit 1)
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
