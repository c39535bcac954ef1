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
