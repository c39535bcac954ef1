"""The Sun's position (``keystrata_physics.sun``).

Outside references: worked examples of Meeus, *Astronomical Algorithms*, 2nd ed. (1998),
quoted from memory (7.a and the chapter's list of Julian days, 12.a and 12.b, 25.a); the
PyEphem library (``ephem`` on PyPI) for Julian days and for the Sun's apparent position
over a grid of dates and places, with its refraction turned off (pressure 0).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from datetime import UTC, datetime, timedelta, timezone

import ephem
import pytest
from hypothesis import given
from hypothesis import strategies as st

from keystrata_physics.sun import (
    SunPosition,
    greenwich_mean_sidereal_deg,
    julian_day,
    julian_day_from_calendar,
    solar_coordinates_deg,
    sun_position,
)


def _hms(hours: int, minutes: int, seconds: float) -> float:
    return 15.0 * (hours + minutes / 60 + seconds / 3600)


def _angle_diff(a: float, b: float) -> float:
    return abs((a - b + 180.0) % 360.0 - 180.0)


# ---------------------------------------------------------------- Julian day


@pytest.mark.parametrize(
    ("year", "month", "day", "jd"),
    [
        (1957, 10, 4.81, 2436116.31),  # Meeus Example 7.a (Sputnik 1), from memory
        # Meeus ch. 7, list of Julian days (from memory), each also given by ephem below.
        (2000, 1, 1.5, 2451545.0),
        (1999, 1, 1.0, 2451179.5),
        (1987, 1, 27.0, 2446822.5),
        (1987, 6, 19.5, 2446966.0),
        (1988, 1, 27.0, 2447187.5),
        (1988, 6, 19.5, 2447332.0),
        (1900, 1, 1.0, 2415020.5),
        (1600, 1, 1.0, 2305447.5),
        (1600, 12, 31.0, 2305812.5),
    ],
)
def test_julian_day_of_meeus_dates(year: int, month: int, day: float, jd: float) -> None:
    assert julian_day_from_calendar(year, month, day) == pytest.approx(jd, abs=1e-6)
    whole = int(day)
    when = datetime(year, month, whole, tzinfo=UTC) + timedelta(days=day - whole)
    assert ephem.julian_date(when) == pytest.approx(jd, abs=1e-5)


@given(st.datetimes(min_value=datetime(1800, 1, 1), max_value=datetime(2200, 1, 1)))
def test_julian_day_matches_ephem(when: datetime) -> None:
    # ephem.julian_date takes naive datetimes as UTC; ours must be aware.
    assert julian_day(when.replace(tzinfo=UTC)) == pytest.approx(ephem.julian_date(when), abs=2e-8)


def test_julian_day_converts_other_zones_to_utc() -> None:
    here = datetime(2026, 6, 21, 14, 0, tzinfo=timezone(timedelta(hours=2)))
    assert julian_day(here) == julian_day(datetime(2026, 6, 21, 12, 0, tzinfo=UTC))
    assert julian_day(datetime(2000, 1, 1, 12, tzinfo=UTC)) == 2451545.0


# ---------------------------------------------------------------- sidereal time


def test_mean_sidereal_time_meeus_example_12a() -> None:
    # Meeus Example 12.a (from memory): 1987 April 10, 0h UT (JD 2446895.5), mean
    # sidereal time at Greenwich 13h10m46.3668s.
    jd = julian_day(datetime(1987, 4, 10, tzinfo=UTC))
    assert jd == 2446895.5
    assert greenwich_mean_sidereal_deg(jd) == pytest.approx(_hms(13, 10, 46.3668), abs=2e-6)


def test_mean_sidereal_time_meeus_example_12b() -> None:
    # Meeus Example 12.b (from memory): 1987 April 10, 19h21m00s UT, 8h34m57.0896s.
    jd = julian_day(datetime(1987, 4, 10, 19, 21, tzinfo=UTC))
    assert greenwich_mean_sidereal_deg(jd) == pytest.approx(_hms(8, 34, 57.0896), abs=2e-6)


# ---------------------------------------------------------------- solar coordinates


def test_solar_coordinates_meeus_example_25a() -> None:
    # Meeus Example 25.a (physics.md, from memory): 1992 October 13.0 TD, apparent
    # right ascension 13h13m31.4s and declination -7 deg 47' 06"; the low-accuracy
    # method's precision is about 0.01 degree. (This implementation gets 0.03 s and 0.3".)
    alpha, delta = solar_coordinates_deg(julian_day_from_calendar(1992, 10, 13.0))
    assert alpha == pytest.approx(_hms(13, 13, 31.4), abs=0.01)
    assert delta == pytest.approx(-(7 + 47 / 60 + 6 / 3600), abs=0.01)
    # Example 25.a's intermediate result, from memory: alpha = -161.61917 degrees.
    assert alpha - 360.0 == pytest.approx(-161.61917, abs=2e-4)


DATES = [
    datetime(y, m, d, h, tzinfo=UTC)
    for y, m, d, h in [
        (2024, 3, 20, 3),
        (2025, 6, 21, 12),
        (2026, 9, 23, 17),
        (2026, 12, 21, 8),
        (2027, 2, 14, 22),
        (2030, 8, 1, 6),
        (2001, 1, 1, 0),
        (2049, 11, 5, 15),
    ]
]
PLACES = [
    (0.0, 0.0),
    (46.9, 7.4),
    (-33.9, 18.4),
    (64.1, -21.9),
    (35.7, 139.7),
    (-77.8, 166.7),
    (19.8, -155.5),
]


def _ephem_sun(when: datetime, lat: float, lon: float) -> ephem.Sun:
    observer = ephem.Observer()
    observer.lat, observer.lon = str(lat), str(lon)
    observer.elevation = 0.0
    observer.pressure = 0.0  # no refraction, as in sun_position
    observer.date = ephem.Date(when.replace(tzinfo=None))
    return ephem.Sun(observer)


@pytest.mark.parametrize("when", DATES, ids=lambda d: d.strftime("%Y%m%d%H"))
def test_right_ascension_and_declination_match_ephem(when: datetime) -> None:
    # ephem's apparent geocentric position of date (g_ra, g_dec).
    sun = _ephem_sun(when, 0.0, 0.0)
    position = sun_position(when, 0.0, 0.0)
    delta = position.declination_deg
    assert delta == pytest.approx(math.degrees(sun.g_dec), abs=0.01)
    ra_gap = _angle_diff(position.right_ascension_deg, math.degrees(sun.g_ra))
    assert ra_gap * math.cos(math.radians(delta)) < 0.01


@pytest.mark.parametrize("when", DATES, ids=lambda d: d.strftime("%Y%m%d%H"))
@pytest.mark.parametrize(("lat", "lon"), PLACES)
def test_elevation_and_azimuth_match_ephem(when: datetime, lat: float, lon: float) -> None:
    # ephem's topocentric apparent altitude and azimuth (north, clockwise) without
    # refraction; its parallax (under 0.003 degree) is the only modelled difference.
    sun = _ephem_sun(when, lat, lon)
    position = sun_position(when, lat, lon)
    assert position.elevation_deg == pytest.approx(math.degrees(sun.alt), abs=0.05)
    if abs(position.elevation_deg) < 85.0:
        gap = _angle_diff(position.azimuth_deg, math.degrees(sun.az))
        assert gap * math.cos(math.radians(position.elevation_deg)) < 0.05


def test_noon_sun_at_the_june_solstice() -> None:
    # At the June solstice the declination is the obliquity, about 23.44 degrees (Meeus
    # ch. 22): the noon Sun stands 90 - 46.9 + 23.44 = 66.5 degrees over Bern, due south.
    solstice_noon = datetime(2026, 6, 21, 11, 0, tzinfo=UTC)  # about 7.4 deg E: 11:30 UTC
    best = max(
        (sun_position(solstice_noon + timedelta(minutes=m), 46.9, 7.4) for m in range(61)),
        key=lambda p: p.elevation_deg,
    )
    assert best.elevation_deg == pytest.approx(90 - 46.9 + 23.44, abs=0.05)
    assert best.azimuth_deg == pytest.approx(180.0, abs=1.0)


@given(
    when=st.datetimes(
        min_value=datetime(1950, 1, 1), max_value=datetime(2100, 1, 1), timezones=st.just(UTC)
    ),
    lat=st.floats(-90.0, 90.0),
    lon=st.floats(-180.0, 180.0),
)
def test_positions_are_in_range(when: datetime, lat: float, lon: float) -> None:
    position = sun_position(when, lat, lon)
    assert isinstance(position, SunPosition)
    assert -90.0 <= position.elevation_deg <= 90.0
    assert 0.0 <= position.azimuth_deg < 360.0
    assert 0.0 <= position.right_ascension_deg < 360.0
    assert abs(position.declination_deg) < 23.45  # never beyond the obliquity


@pytest.mark.parametrize(
    ("call", "field"),
    [
        (lambda: sun_position(datetime(2026, 1, 1), 0.0, 0.0), "timezone-aware"),
        (lambda: sun_position(datetime(2026, 1, 1, tzinfo=UTC), 91.0, 0.0), "latitude_deg"),
        (lambda: sun_position(datetime(2026, 1, 1, tzinfo=UTC), 0.0, 181.0), "longitude_deg"),
        (lambda: sun_position(datetime(2026, 1, 1, tzinfo=UTC), math.nan, 0.0), "latitude_deg"),
        (lambda: julian_day_from_calendar(2026, 13, 1.0), "month"),
        (lambda: julian_day_from_calendar(2026, 1, 0.5), "day"),
        (lambda: julian_day_from_calendar(0, 1, 1.0), "year"),
        (lambda: greenwich_mean_sidereal_deg(math.inf), "jd"),
    ],
)
def test_bad_input_is_refused_by_name(call: Callable[[], object], field: str) -> None:
    with pytest.raises(ValueError, match=field):
        call()
