"""Planned against observed, per link: the pool levels, the metrics and the readiness
note carry the link model's rate for now beside the ingest rate, driven here by real
link key pushed through the API and a node clock set to a summer night."""

from __future__ import annotations

import base64
import dataclasses
import os
import uuid
from datetime import UTC, datetime, timedelta

import pytest

from keystrata_physics import link
from keystrata_physics.optics import LinkOptics, Platform, StationSky
from scrapes import READY, scrape

PLATFORM = {"latitude_deg": 58.0, "longitude_deg": 12.0, "altitude_m": 20_000.0}
SKY = {"latitude_deg": 58.2, "longitude_deg": 12.1, "height_m": 30.0}
OPTICS = {"rx_aperture_m": 0.3, "clock_hz": 1.0e8}
NIGHT = datetime(2026, 6, 21, 23, 30, tzinfo=UTC)


@dataclasses.dataclass
class _Clock:
    moment: datetime

    def now(self) -> datetime:
        return self.moment


def _blocks(n: int, at: datetime) -> dict[str, object]:
    return {
        "blocks": [
            {
                "block_id": str(uuid.uuid4()),
                "key": base64.b64encode(os.urandom(1024)).decode(),
                "qber": 0.02,
                "epsilon": 1e-10,
                "produced_at": at.isoformat(),
            }
            for _ in range(n)
        ]
    }


@pytest.fixture
def night_station(station):
    clock = _Clock(NIGHT)
    node = dataclasses.replace(station, ctx=dataclasses.replace(station.ctx, clock=clock))
    return node, clock


def _provision(ops) -> None:
    assert ops.patch("/api/v1/registry/nodes/relay-1", json={"physical": PLATFORM}).is_success
    assert ops.patch("/api/v1/registry/nodes/station-a", json={"physical": SKY}).is_success
    assert ops.patch("/api/v1/registry/links/link-a", json={"optics": OPTICS}).is_success


def test_a_link_far_below_plan_shows_in_pools_metrics_and_readiness(night_station, api) -> None:
    node, clock = night_station
    ops, module = api(node)("ops-ada"), api(node)("mod-link-a")
    _provision(ops)
    assert module.post("/api/v1/links/link-a/blocks", json=_blocks(2, NIGHT)).is_success
    clock.moment = NIGHT + timedelta(seconds=200)
    assert module.post("/api/v1/links/link-a/blocks", json=_blocks(3, clock.moment)).is_success
    window = node.ctx.settings.ingest.rate_window_seconds
    clock.moment = NIGHT + timedelta(seconds=window + 1)  # the first push left the window

    planned = link.at(
        LinkOptics(**OPTICS), Platform(**PLATFORM), StationSky(**SKY), clock.moment
    ).secret_key_rate_bps
    assert planned > 1e5  # a clear summer night at 58 N: the model makes key
    observed = 3 * 1024 * 8 / window
    (pool,) = ops.get("/api/v1/links/pools").json()["pools"]
    assert pool["rate_bps"] == pytest.approx(observed)
    assert pool["planned_rate_bps"] == pytest.approx(planned, rel=1e-9)
    assert pool["plan_ratio"] == pytest.approx(observed / planned, rel=1e-9)

    m = scrape(ops)
    assert m.value("keystrata_link_planned_rate_bps", link="link-a") == pytest.approx(planned)
    assert m.value("keystrata_link_plan_ratio", link="link-a") == pytest.approx(observed / planned)

    r = ops.get(READY)
    assert r.status_code == 200, r.text  # advisory: the node still serves
    note = r.json()["checks"]["links"]
    assert note.startswith("below plan: link-a at 0 % of plan"), note


def test_a_link_on_plan_or_without_a_full_window_raises_no_note(night_station, api) -> None:
    node, clock = night_station
    ops, module = api(node)("ops-ada"), api(node)("mod-link-a")
    _provision(ops)
    assert module.post("/api/v1/links/link-a/blocks", json=_blocks(1, NIGHT)).is_success
    clock.moment = NIGHT + timedelta(seconds=10)  # far below plan, but the window is young
    assert ops.get(READY).json()["checks"]["links"] == "ok"
    (pool,) = ops.get("/api/v1/links/pools").json()["pools"]
    assert pool["plan_ratio"] is not None and pool["plan_ratio"] < 0.01


def test_without_a_profile_nothing_is_planned(station, api) -> None:
    ops = api(station)("ops-ada")
    (pool,) = ops.get("/api/v1/links/pools").json()["pools"]
    assert pool["planned_rate_bps"] is None and pool["plan_ratio"] is None
    assert not scrape(ops).samples("keystrata_link_planned_rate_bps")
    assert ops.get(READY).json()["checks"]["links"] == "ok"
