"""``keystrata plan`` against a real node process: tables, JSON and plots from the
registry's physical profiles, through the SDK and mutual TLS."""

from __future__ import annotations

import json
import re
import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest

from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, prepare_node, run_cli
from keystrata_client import OperatorClient, TlsIdentity


@pytest.fixture
def station_process(tmp_path: Path, pki: PkiFiles, sqlite_template: Path) -> Iterator[NodeProcess]:
    db = tmp_path / "station.db"
    shutil.copy(sqlite_template, db)
    node = prepare_node(tmp_path, pki, "station-a", "station", f"sqlite:///{db}").start(pki)
    try:
        yield node
    finally:
        node.stop()


def test_plan_prints_tables_json_and_writes_plots(
    station_process: NodeProcess, pki: PkiFiles, tmp_path: Path
) -> None:
    ops_id = TlsIdentity(ca=pki.ca, cert=pki.cert("ops-ada"), key=pki.key("ops-ada"))
    with OperatorClient(station_process.url, ops_id) as ops:
        ops.create(
            "nodes",
            {
                "node_id": "relay-1",
                "role": "relay",
                "physical": {"latitude_deg": 58.0, "longitude_deg": 12.0},
            },
        )
        ops.change(
            "nodes",
            "station-a",
            {"physical": {"latitude_deg": 58.3, "longitude_deg": 12.2, "clear_sky": 0.5}},
        )
        ops.create(
            "links",
            {
                "link_id": "link-a",
                "relay_id": "relay-1",
                "station_id": "station-a",
                "optics": {"rx_aperture_m": 0.3, "filter_nm": 0.05, "fov_urad": 30.0},
            },
        )
    env = {
        "KEYSTRATA_URL": station_process.url,
        "KEYSTRATA_CA": str(pki.ca),
        "KEYSTRATA_CERT": str(pki.cert("ops-ada")),
        "KEYSTRATA_KEY": str(pki.key("ops-ada")),
    }
    as_json = json.loads(run_cli("plan", "--day", "2026-12-21", "--json", env=env).stdout)
    (row,) = as_json["links"]
    assert row["link_id"] == "link-a" and row["planned"]
    assert 0 < row["secret_key_rate_bps"] < row["plob_bound_bps"]
    assert row["daily_secret_bits"] > 0 and len(row["hourly"]) == 24

    plots = tmp_path / "plots"
    table = run_cli(
        "plan", "--day", "2026-12-21", "--plots", str(plots), "--format", "svg", env=env
    )
    out = table.stdout
    tables = out.split("wrote", 1)[0]  # the paths of the plots name the link too
    assert "decoy-bb84" in tables and "not a security proof" in out
    # A single link keeps its whole ID as its column's header.
    assert re.search(r"┃\s+┃\s+link-a ┃", tables), tables
    written = sorted(p.name for p in plots.iterdir())
    assert written == ["link-a-day.svg", "link-a-loss.svg", "pairs-supply.svg"]
    for name in written:
        assert (plots / name).read_text().lstrip().startswith("<?xml")
    png = tmp_path / "png"
    run_cli("plan", "--plots", str(png), env=env)
    assert (png / "link-a-day.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature

    bad = run_cli("plan", "--day", "yesterday", env=env, check=False)
    assert bad.returncode == 1 and "day" in bad.stderr and "Traceback" not in bad.stderr
