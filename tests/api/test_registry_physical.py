"""Physical profiles in the registry: a node's position and sky, a link's optics.

Bad optical parameters get a 400 naming the field and change nothing (issue "Physical
link model and key-supply planning", Done when).
"""

from __future__ import annotations

import pytest

from helpers import snapshot

PLATFORM = {"latitude_deg": 57.1, "longitude_deg": 11.4, "altitude_m": 20_000.0}
STATION = {"latitude_deg": 57.3, "longitude_deg": 11.2, "height_m": 40.0, "clear_sky": 0.7}
OPTICS = {"protocol": "decoy-bb84", "rx_aperture_m": 0.5, "divergence_urad": 8.0}


def test_profiles_are_stored_and_returned(station, api) -> None:
    ops = api(station)("ops-ada")
    r = ops.patch("/api/v1/registry/nodes/relay-1", json={"physical": PLATFORM})
    assert r.status_code == 200, r.text
    assert r.json()["physical"] == PLATFORM
    r = ops.patch("/api/v1/registry/nodes/station-a", json={"physical": STATION})
    assert r.status_code == 200, r.text
    r = ops.patch("/api/v1/registry/links/link-a", json={"optics": OPTICS})
    assert r.status_code == 200, r.text
    assert ops.get("/api/v1/registry/links/link-a").json()["optics"] == OPTICS
    r = ops.post(
        "/api/v1/registry/nodes",
        json={"node_id": "station-z", "role": "station", "physical": STATION},
    )
    assert r.status_code == 201, r.text
    assert r.json()["physical"] == STATION
    # null clears a profile
    r = ops.patch("/api/v1/registry/links/link-a", json={"optics": None})
    assert r.status_code == 200 and r.json()["optics"] is None


@pytest.mark.parametrize(
    ("path", "body", "field"),
    [
        ("links/link-a", {"optics": OPTICS | {"rx_aperture_m": -0.1}}, "optics.rx_aperture_m"),
        ("links/link-a", {"optics": {"protocol": "bb85"}}, "optics.protocol"),
        ("links/link-a", {"optics": {"misalignment": 0.7}}, "optics.misalignment"),
        ("links/link-a", {"optics": {"mu": 0.1, "nu": 0.2}}, "optics.nu"),
        ("links/link-a", {"optics": {"aperture": 0.3}}, "optics.aperture"),
        ("nodes/station-a", {"physical": STATION | {"latitude_deg": 91}}, "physical.latitude_deg"),
        ("nodes/station-a", {"physical": STATION | {"clear_sky": 1.5}}, "physical.clear_sky"),
        # a relay's profile is a platform: a station's sky fields are unknown there
        ("nodes/relay-1", {"physical": STATION}, "physical.clear_sky"),
        ("nodes/relay-1", {"physical": PLATFORM | {"altitude_m": -5}}, "physical.altitude_m"),
        ("nodes/relay-1", {"physical": {"longitude_deg": 3.0}}, "physical"),  # latitude missing
    ],
)
def test_bad_profiles_name_the_field_and_change_nothing(station, api, path, body, field) -> None:
    ops = api(station)("ops-ada")
    before = snapshot(station.ctx)
    r = ops.patch(f"/api/v1/registry/{path}", json=body)
    assert r.status_code == 400, r.text
    assert r.json()["details"][0]["field"] == field, r.json()
    assert field.split(".")[-1] in r.json()["message"] or field == "physical"
    assert snapshot(station.ctx) == before


def test_a_new_link_with_bad_optics_is_refused(station, api) -> None:
    ops = api(station)("ops-ada")
    before = snapshot(station.ctx)
    r = ops.post(
        "/api/v1/registry/links",
        json={
            "link_id": "link-z",
            "relay_id": "relay-1",
            "station_id": "station-a",
            "optics": {"wavelength_nm": 12},
        },
    )
    assert r.status_code == 400, r.text
    assert r.json()["details"][0]["field"] == "optics.wavelength_nm"
    assert snapshot(station.ctx) == before


FAR_STATION = {"latitude_deg": 63.5, "longitude_deg": 11.2}  # about 710 km north


def test_a_platform_below_a_stations_horizon_is_refused(station, api) -> None:
    """From 20 km the horizon is about 505 km away (spherical Earth, common practice): a
    station 710 km from the platform cannot see it, whichever entry completes the link."""
    ops = api(station)("ops-ada")
    assert ops.patch("/api/v1/registry/links/link-a", json={"optics": OPTICS}).is_success
    assert ops.patch("/api/v1/registry/nodes/relay-1", json={"physical": PLATFORM}).is_success
    before = snapshot(station.ctx)
    r = ops.patch("/api/v1/registry/nodes/station-a", json={"physical": FAR_STATION})
    assert r.status_code == 400, r.text
    assert r.json()["details"][0] == {"field": "physical", "problem": "platform below the horizon"}
    assert "station-a would see the platform of relay-1 at -" in r.json()["message"]
    assert snapshot(station.ctx) == before
    # A station near enough is fine; then moving the platform away is refused the same way.
    assert ops.patch("/api/v1/registry/nodes/station-a", json={"physical": STATION}).is_success
    before = snapshot(station.ctx)
    r = ops.patch(
        "/api/v1/registry/nodes/relay-1",
        json={"physical": PLATFORM | {"latitude_deg": 50.0}},
    )
    assert r.status_code == 400 and r.json()["details"][0]["field"] == "physical"
    assert snapshot(station.ctx) == before


def test_a_new_link_to_a_station_over_the_horizon_is_refused(station, api) -> None:
    ops = api(station)("ops-ada")
    assert ops.patch("/api/v1/registry/nodes/relay-1", json={"physical": PLATFORM}).is_success
    r = ops.post(
        "/api/v1/registry/nodes",
        json={"node_id": "station-far", "role": "station", "physical": FAR_STATION},
    )
    assert r.status_code == 201  # no link yet: nothing to fly
    before = snapshot(station.ctx)
    r = ops.post(
        "/api/v1/registry/links",
        json={
            "link_id": "link-far",
            "relay_id": "relay-1",
            "station_id": "station-far",
            "optics": OPTICS,
        },
    )
    assert r.status_code == 400, r.text
    assert r.json()["details"][0]["field"] == "optics"
    assert snapshot(station.ctx) == before
