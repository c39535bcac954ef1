"""The key-supply plan route at a relay: the link model applied to the registry's
profiles, pairs sharing a link by the scheduler's fairness rule, bad input refused."""

from __future__ import annotations

import pytest

from helpers import snapshot
from keystrata.relay import fairness

PLATFORM = {"latitude_deg": 58.0, "longitude_deg": 12.0, "altitude_m": 20_000.0}


def _station(lat: float, lon: float) -> dict[str, float]:
    return {"latitude_deg": lat, "longitude_deg": lon, "height_m": 30.0, "clear_sky": 0.6}


def _provision(ops) -> None:
    assert ops.patch("/api/v1/registry/nodes/relay-1", json={"physical": PLATFORM}).is_success
    for node, (lat, lon) in {
        "station-a": (58.2, 12.1),
        "station-b": (57.8, 11.8),
        "station-c": (58.1, 12.3),
    }.items():
        r = ops.patch(f"/api/v1/registry/nodes/{node}", json={"physical": _station(lat, lon)})
        assert r.is_success, r.text
    # link-a has a small receiver, so it is the bottleneck both pairs share.
    for link, aperture in (("link-a", 0.1), ("link-b", 0.5)):
        r = ops.patch(
            f"/api/v1/registry/links/{link}", json={"optics": {"rx_aperture_m": aperture}}
        )
        assert r.is_success, r.text
    r = ops.post(
        "/api/v1/registry/links",
        json={
            "link_id": "link-c",
            "relay_id": "relay-1",
            "station_id": "station-c",
            "optics": {"rx_aperture_m": 0.5},
        },
    )
    assert r.status_code == 201, r.text
    r = ops.post(
        "/api/v1/registry/pairs",
        json={
            "pair_id": "pair-ab",
            "relay_id": "relay-1",
            "stations": ["station-a", "station-b"],
            "policy": {"priority": 300},
        },
    )
    assert r.status_code == 201, r.text


def test_plan_per_link_and_per_pair(relay, api) -> None:
    ops = api(relay)("ops-ada")
    _provision(ops)
    r = ops.get("/api/v1/plan", params={"day": "2026-06-21"})
    assert r.status_code == 200, r.text
    plan = r.json()
    assert "not a security proof" in plan["caution"]
    links = {row["link_id"]: row for row in plan["links"]}
    for row in links.values():
        assert row["planned"], row
        for field in (
            "protocol",
            "slant_range_m",
            "elevation_deg",
            "footprint_diameter_m",
            "geometric_loss_db",
            "total_loss_db",
            "qber",
            "secret_key_rate_bps",
            "plob_bound_bps",
            "daily_secret_bits",
        ):
            assert row[field] is not None, (row["link_id"], field)
        assert len(row["hourly"]) == 24
        assert 0 < row["secret_key_rate_bps"] < row["plob_bound_bps"]
        # a platform at 20 km and a station tens of km away: a slant range above 15 km
        # (common practice for stratospheric links)
        assert row["slant_range_m"] > 15_000
    # Midsummer at 58 N: the night hours make more key than noon, at a lower QBER.
    hourly = links["link-b"]["hourly"]
    noon = next(h for h in hourly if h["hour_utc"] == 11)
    night = next(h for h in hourly if h["hour_utc"] == 23)
    assert noon["sun_elevation_deg"] > 40 and night["sun_elevation_deg"] < 0
    assert night["secret_key_rate_bps"] > noon["secret_key_rate_bps"]
    assert noon["qber"] is None or noon["qber"] > night["qber"]

    pairs = {row["pair_id"]: row for row in plan["pairs"]}
    assert set(pairs) == {"pair-ab", "pair-ac"}
    # The two pairs share link-a by the scheduler's weighted max-min rule (priorities 300
    # and 100); the plan must give exactly what fairness.allocate gives on the same input.
    segment = relay.ctx.settings.relay.segment_bytes
    usable = segment / (segment + 32)
    available = {k: int(v["daily_secret_bits"] * usable / 8) for k, v in links.items()}
    unbounded = sum(available.values()) + 1
    expected = fairness.allocate(
        [
            fairness.PairDemand("pair-ab", ("link-a", "link-b"), 300, unbounded),
            fairness.PairDemand("pair-ac", ("link-a", "link-c"), 100, unbounded),
        ],
        available,
    )
    for pair_id, share in expected.items():
        assert pairs[pair_id]["daily_supply_bits"] == pytest.approx(8 * share, rel=1e-3)
    assert pairs["pair-ab"]["daily_supply_bits"] == pytest.approx(
        3 * pairs["pair-ac"]["daily_supply_bits"], rel=1e-3
    )
    # No demand measured and no quota: no demand, no buffer figure, but a supply.
    assert pairs["pair-ab"]["daily_demand_bits"] is None


def test_a_link_without_profiles_says_what_is_missing(relay, api) -> None:
    ops = api(relay)("ops-ada")
    plan = ops.get("/api/v1/plan").json()
    link_a = next(row for row in plan["links"] if row["link_id"] == "link-a")
    assert not link_a["planned"]
    assert "links/link-a: optics" in link_a["missing"]
    assert "nodes/relay-1: physical" in link_a["missing"]


@pytest.mark.parametrize("day", ["21-06-2026", "2026-13-01", "tomorrow"])
def test_a_bad_day_is_a_400_and_changes_nothing(relay, api, day) -> None:
    ops = api(relay)("ops-ada")
    before = snapshot(relay.ctx)
    r = ops.get("/api/v1/plan", params={"day": day})
    assert r.status_code == 400
    assert r.json()["details"][0]["field"] == "day"
    assert snapshot(relay.ctx) == before


def test_monitor_reads_the_plan_and_saes_do_not(relay, api) -> None:
    assert api(relay)("mon-cal").get("/api/v1/plan").status_code == 200
    assert api(relay)("sae-a1").get("/api/v1/plan").status_code == 403


def test_a_pair_with_a_small_demand_leaves_its_share_to_the_other(relay, api) -> None:
    """pair-ac asks for a small daily quota: pair-ab's supply is what fairness gives it
    when pair-ac asks for that quota only; pair-ac's supply is its share when it asks for
    everything it can get (its surplus is then positive)."""
    ops = api(relay)("ops-ada")
    _provision(ops)
    quota = 10_000_000
    r = ops.patch("/api/v1/registry/pairs/pair-ac", json={"policy": {"daily_quota_bits": quota}})
    assert r.is_success, r.text
    plan = ops.get("/api/v1/plan", params={"day": "2026-06-21"}).json()
    links = {row["link_id"]: row for row in plan["links"]}
    pairs = {row["pair_id"]: row for row in plan["pairs"]}
    segment = relay.ctx.settings.relay.segment_bytes
    available = {
        k: int(v["daily_secret_bits"] * segment / (segment + 32) / 8) for k, v in links.items()
    }
    unbounded = sum(available.values()) + 1

    def share(pair_id: str, ab: int, ac: int) -> int:
        given = fairness.allocate(
            [
                fairness.PairDemand("pair-ab", ("link-a", "link-b"), 300, ab),
                fairness.PairDemand("pair-ac", ("link-a", "link-c"), 100, ac),
            ],
            available,
        )
        return 8 * given[pair_id]

    ab, ac = pairs["pair-ab"], pairs["pair-ac"]
    assert ac["daily_demand_bits"] == quota and ac["demand_source"] == "policy"
    assert ab["daily_supply_bits"] == pytest.approx(
        share("pair-ab", unbounded, quota // 8), rel=1e-3
    )
    assert ac["daily_supply_bits"] == pytest.approx(
        share("pair-ac", unbounded, unbounded), rel=1e-3
    )
    assert ac["daily_surplus_bits"] == pytest.approx(ac["daily_supply_bits"] - quota, rel=1e-3)
    assert ac["daily_surplus_bits"] > 0
    assert ac["buffer_bits_needed"] > 0  # a demand and cloud spells: a buffer to hold
