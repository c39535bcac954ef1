"""Geometry of a station and a platform (``keystrata_physics.geometry``).

Outside references: pymap3d (PyPI, a general-purpose geodesy library) on a spherical
ellipsoid of the same radius for ECEF positions and azimuth/elevation/range; Pythagoras
for the horizon distance; a brute-force search over the station-keeping circle.
"""

from __future__ import annotations

import math

import pymap3d
import pymap3d.vincenty
import pytest
from hypothesis import given
from hypothesis import strategies as st

from keystrata_physics.geometry import (
    EARTH_RADIUS_M,
    Look,
    Site,
    ecef_m,
    look,
    slant_range_m,
    station_keeping_span,
)

SPHERE = pymap3d.Ellipsoid(EARTH_RADIUS_M, EARTH_RADIUS_M, name="sphere")


# ---------------------------------------------------------------- slant range


def test_slant_range_worked_example_20_km_at_30_degrees() -> None:
    """Hand-worked (physics.md formula, spherical Earth R = 6371 km): r0 = 6,371,000 m,
    r1 = 6,391,000 m; r1^2 - r0^2 = 20,000 x 12,762,000 = 2.5524e11 m^2;
    r0^2 cos^2 30 = 4.0589641e13 x 0.75 = 3.0442231e13; r1^2 = 4.0844881e13;
    sqrt(4.0844881e13 - 3.0442231e13) = sqrt(1.0402650e13) = 3,225,314 m;
    r0 sin 30 = 3,185,500 m; L = 3,225,314 - 3,185,500 = 39,814 m (about 39.8 km)."""
    assert slant_range_m(30.0, 0.0, 20_000.0) == pytest.approx(39_814.0, abs=2.0)


def test_slant_range_at_the_zenith_is_the_height_difference() -> None:
    assert slant_range_m(90.0, 1_200.0, 20_000.0) == pytest.approx(18_800.0, rel=1e-12)


def test_slant_range_at_the_horizon_is_the_tangent_length() -> None:
    # Pythagoras in the right triangle centre-station-platform: L^2 = r1^2 - r0^2, about
    # 505 km from 20 km (the horizon distance sqrt(2 R H), common practice).
    r0, r1 = EARTH_RADIUS_M, EARTH_RADIUS_M + 20_000.0
    assert slant_range_m(0.0, 0.0, 20_000.0) == pytest.approx(math.sqrt(r1**2 - r0**2))
    assert slant_range_m(0.0, 0.0, 20_000.0) == pytest.approx(505e3, rel=0.002)


@given(
    low=st.floats(0.0, 89.0),
    step=st.floats(0.01, 10.0),
    station=st.floats(-400.0, 5_000.0),
    platform=st.floats(10_000.0, 40_000.0),
)
def test_slant_range_falls_as_the_elevation_rises(
    low: float, step: float, station: float, platform: float
) -> None:
    high = min(90.0, low + step)
    assert slant_range_m(high, station, platform) < slant_range_m(low, station, platform)


@given(
    lat=st.floats(-80.0, 80.0),
    lon=st.floats(-175.0, 175.0),
    dlat=st.floats(-3.0, 3.0),
    dlon=st.floats(-3.0, 3.0),
    height=st.floats(0.0, 3_000.0),
)
def test_formula_and_vectors_agree(
    lat: float, lon: float, dlat: float, dlon: float, height: float
) -> None:
    """The physics.md range formula at the elevation ``look`` finds from the vectors gives
    the vectors' own distance: two derivations of one triangle."""
    station = Site(lat, lon, height)
    platform = Site(lat + dlat, lon + dlon, 20_000.0)
    seen = look(station, platform)
    if seen.elevation_deg < 0.0:
        return
    expected = slant_range_m(seen.elevation_deg, height, 20_000.0)
    assert seen.slant_range_m == pytest.approx(expected, rel=1e-7, abs=1e-3)


@pytest.mark.parametrize(
    ("args", "field"),
    [
        ((-0.1, 0.0, 20_000.0), "below the horizon"),
        ((90.5, 0.0, 20_000.0), "elevation_deg"),
        ((math.nan, 0.0, 20_000.0), "elevation_deg"),
        ((30.0, -600.0, 20_000.0), "station_height_m"),
        ((30.0, 0.0, math.inf), "platform_altitude_m"),
        ((30.0, 25_000.0, 20_000.0), "platform_altitude_m must be above"),
    ],
)
def test_slant_range_refuses_bad_input(args: tuple[float, float, float], field: str) -> None:
    with pytest.raises(ValueError, match=field):
        slant_range_m(*args)


# ---------------------------------------------------------------- sites and look angles


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"latitude_deg": 90.1, "longitude_deg": 0.0}, "latitude_deg"),
        ({"latitude_deg": 0.0, "longitude_deg": -180.5}, "longitude_deg"),
        ({"latitude_deg": math.nan, "longitude_deg": 0.0}, "latitude_deg"),
        ({"latitude_deg": 0.0, "longitude_deg": 0.0, "height_m": -500.0}, "height_m"),
        ({"latitude_deg": 0.0, "longitude_deg": 0.0, "height_m": math.inf}, "height_m"),
    ],
)
def test_site_refuses_bad_input(kwargs: dict[str, float], field: str) -> None:
    with pytest.raises(ValueError, match=field):
        Site(**kwargs)


@pytest.mark.parametrize(
    "site", [Site(0.0, 0.0), Site(47.3, 8.5, 500.0), Site(-33.9, -70.6, 2_400.0), Site(90, 0)]
)
def test_ecef_matches_pymap3d_on_a_sphere(site: Site) -> None:
    # pymap3d.geodetic2ecef on an ellipsoid with equal axes (PyPI reference library).
    expected = pymap3d.geodetic2ecef(site.latitude_deg, site.longitude_deg, site.height_m, SPHERE)
    assert ecef_m(site) == pytest.approx(tuple(float(v) for v in expected), abs=1e-6)


@given(
    lat=st.floats(-85.0, 85.0),
    lon=st.floats(-175.0, 175.0),
    dlat=st.floats(-4.0, 4.0),
    dlon=st.floats(-4.0, 4.0),
    h0=st.floats(-100.0, 4_000.0),
    h1=st.floats(5_000.0, 40_000.0),
)
def test_look_matches_pymap3d_on_a_sphere(
    lat: float, lon: float, dlat: float, dlon: float, h0: float, h1: float
) -> None:
    # pymap3d.geodetic2aer: azimuth clockwise from north, elevation, slant range.
    station = Site(lat, lon, h0)
    platform = Site(lat + dlat, lon + dlon, h1)
    seen = look(station, platform)
    az, el, rng = (
        float(v)
        for v in pymap3d.geodetic2aer(
            platform.latitude_deg, platform.longitude_deg, h1, lat, lon, h0, ell=SPHERE
        )
    )
    assert seen.slant_range_m == pytest.approx(rng, rel=1e-9)
    # pymap3d takes an arcsine, which loses digits next to the zenith (ours is an atan2).
    assert seen.elevation_deg == pytest.approx(el, abs=1e-7 if el < 89.0 else 1e-5)
    if el < 89.9:  # the azimuth is undefined overhead
        assert math.cos(math.radians(seen.azimuth_deg - az)) == pytest.approx(1.0, abs=1e-9)


@pytest.mark.parametrize(
    ("dlat", "dlon", "azimuth"), [(0.1, 0.0, 0.0), (0.0, 0.1, 90.0), (-0.1, 0.0, 180.0)]
)
def test_azimuth_counts_clockwise_from_north(dlat: float, dlon: float, azimuth: float) -> None:
    # At the equator, a platform due north, east or south of the station.
    seen = look(Site(0.0, 10.0), Site(dlat, 10.0 + dlon, 20_000.0))
    assert seen.azimuth_deg == pytest.approx(azimuth, abs=1e-9)
    west = look(Site(0.0, 10.0), Site(0.0, 9.9, 20_000.0))
    assert west.azimuth_deg == pytest.approx(270.0, abs=1e-9)


def test_look_straight_up() -> None:
    seen = look(Site(45.0, 7.0, 300.0), Site(45.0, 7.0, 20_300.0))
    assert seen.slant_range_m == pytest.approx(20_000.0, rel=1e-12)
    assert seen.elevation_deg == pytest.approx(90.0, abs=1e-9)
    assert isinstance(seen, Look)


def test_look_refuses_coincident_positions() -> None:
    with pytest.raises(ValueError, match="platform"):
        look(Site(1.0, 2.0, 3.0), Site(1.0, 2.0, 3.0))


# ---------------------------------------------------------------- station keeping


def _brute_force(station: Site, centre: Site, radius_m: float, n: int) -> list[Look]:
    """Points of the circle from pymap3d's spherical direct geodesic problem (vreckon)."""
    looks = []
    for i in range(n):
        lat, lon = (
            float(v)
            for v in pymap3d.vincenty.vreckon(
                centre.latitude_deg, centre.longitude_deg, radius_m, 360.0 * i / n, SPHERE
            )
        )
        lon = (lon + 540.0) % 360.0 - 180.0
        looks.append(look(station, Site(lat, lon, centre.height_m)))
    return looks


@pytest.mark.parametrize(
    ("station", "centre", "radius"),
    [
        (Site(46.0, 8.0, 400.0), Site(46.3, 8.2, 20_000.0), 5_000.0),
        (Site(46.0, 8.0, 400.0), Site(46.0, 8.0, 20_000.0), 2_000.0),  # centre overhead
        (Site(-20.0, 150.0), Site(-19.5, 150.4, 21_000.0), 50_000.0),  # station inside
        (Site(60.0, -179.9), Site(60.1, 179.8, 18_000.0), 3_000.0),  # across the date line
    ],
)
def test_station_keeping_span_bounds_a_dense_brute_force(
    station: Site, centre: Site, radius: float
) -> None:
    span = station_keeping_span(station, centre, radius, samples=8)
    dense = _brute_force(station, centre, radius, 3_600)
    ranges = [v.slant_range_m for v in dense]
    elevations = [v.elevation_deg for v in dense]
    # Never narrower than 3600 points of the circle, and not wider than their step allows.
    assert span.min_range_m <= min(ranges) + 1e-6
    assert span.max_range_m >= max(ranges) - 1e-6
    assert span.min_elevation_deg <= min(elevations) + 1e-9
    assert span.max_elevation_deg >= max(elevations) - 1e-9
    assert span.min_range_m == pytest.approx(min(ranges), rel=1e-5)
    assert span.max_range_m == pytest.approx(max(ranges), rel=1e-5)
    assert span.min_elevation_deg == pytest.approx(min(elevations), abs=2e-3)
    assert span.max_elevation_deg == pytest.approx(max(elevations), abs=2e-3)


def test_station_keeping_span_of_radius_zero_is_the_centre() -> None:
    station, centre = Site(46.0, 8.0, 400.0), Site(46.3, 8.2, 20_000.0)
    span = station_keeping_span(station, centre, 0.0)
    seen = look(station, centre)
    assert (span.min_range_m, span.max_range_m) == (seen.slant_range_m, seen.slant_range_m)
    assert span.min_elevation_deg == span.max_elevation_deg == seen.elevation_deg


def test_station_keeping_span_overhead_reaches_the_zenith_side() -> None:
    # Centre straight overhead at 20 km, circle of 2 km: every point is at the same ground
    # distance, so the span is one value: atan(20 km / 2 km) within the Earth's curvature.
    span = station_keeping_span(Site(0.0, 0.0), Site(0.0, 0.0, 20_000.0), 2_000.0)
    assert span.min_elevation_deg == pytest.approx(span.max_elevation_deg, abs=1e-6)
    assert span.max_elevation_deg == pytest.approx(math.degrees(math.atan(10.0)), abs=0.02)


@pytest.mark.parametrize(
    ("radius", "samples", "field"),
    [
        (-1.0, 72, "radius_m"),
        (math.nan, 72, "radius_m"),
        (3e7, 72, "radius_m"),
        (1.0, 0, "samples"),
    ],
)
def test_station_keeping_span_refuses_bad_input(radius: float, samples: int, field: str) -> None:
    with pytest.raises(ValueError, match=field):
        station_keeping_span(Site(0.0, 0.0), Site(0.1, 0.0, 20_000.0), radius, samples)
