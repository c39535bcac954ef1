"""The load test script (``python -m loadtest``) in its ``--quick`` mode: real
processes, two workers per station on PostgreSQL, 8 SAE clients, 150 keys. It keeps the
script working; the full run (64 clients, 20,000 keys) is ``make load``."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import PG_URL

ROOT = Path(__file__).resolve().parents[2]


def test_quick_load_run(pg_template: str | None, tmp_path: Path) -> None:
    if pg_template is None:
        pytest.skip(f"no PostgreSQL at {PG_URL} (set CI=1 to make this a failure)")
    out = tmp_path / "summary.json"
    run = subprocess.run(
        [sys.executable, "-m", "loadtest", "--quick", "--pg-url", PG_URL, "--out", str(out)],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=240,
    )
    assert run.returncode in (0, 1), f"the run could not be set up:\n{run.stdout}\n{run.stderr}"
    summary = json.loads(out.read_text())
    # What must hold whatever else happens: no key handed out twice, the same key at
    # master and slave, and the figures the script reports.
    for violation in summary["violations"]:
        assert "shared" not in violation and "mismatch" not in violation, violation
    for call in ("enc_keys", "dec_keys"):
        figures = summary["latency"][call]
        assert figures["count"] > 0
        assert 0 < figures["p50_ms"] <= figures["p90_ms"] <= figures["p99_ms"] <= figures["max_ms"]
    assert summary["settings"]["clients"] == 8 and summary["settings"]["station_workers"] == 2
    assert ("PASS" in run.stdout) == summary["ok"] == (run.returncode == 0)
    assert summary["ok"], f"violations:\n{run.stdout}"
    assert summary["keys_delivered"] >= 150
