"""The link model's input records (``keystrata_physics.optics``).

What is checked here is the contract of the records rather than physics: every field
refuses values outside its range with a ValueError whose message starts with the field's
name (the project's rule "bad input gets a clear error naming the field"; the registry
reads the first word of the message as the field, ``keystrata.registry.specs``), the
JSON-like mapping is read strictly, the clear-sky table takes its three shapes, and the
on-station schedule is compared with an independent expansion of its windows into the
sets of minutes they cover. Where a range comes from physics the reason is beside it.
"""

from __future__ import annotations

import dataclasses
import json
import math
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st

from keystrata_physics.bb84 import MAX_MEAN_PHOTON_NUMBER
from keystrata_physics.optics import LinkOptics, Platform, Protocol, StationSky, from_mapping

#: Values no numeric field takes: not finite, not numbers, booleans (JSON true is not 1).
NOT_NUMBERS: list[object] = [math.nan, math.inf, -math.inf, "1", None, True]

#: Per field of LinkOptics, values it must refuse (beside NOT_NUMBERS where numeric).
OPTICS_BAD: dict[str, list[object]] = {
    "protocol": ["bb85", "", None, 3],
    "clock_hz": [0.0, -1.0, 2e12],
    "wavelength_nm": [299.0, 2001.0, 0.0],
    # below 0.01 microradian the waist passes 27 m and the capture rounds to zero
    "divergence_urad": [0.0, 0.001, 1.1e5],
    "rx_aperture_m": [0.0, 0.0005, 21.0],
    "pointing_jitter_urad": [-1e-9, 1.1e5],
    "zenith_transmittance": [0.0, 1e-12, 1.0000001],
    "turbulence": [1, 0, "true", None],
    "receiver_efficiency": [0.0, 1.5],
    "detector_efficiency": [0.0, -0.1, 1.01],
    "dark_count_rate_hz": [-1.0],
    "detectors": [0, 17, 2.0, True, "4"],
    "gate_ns": [0.0, -1.0],
    "filter_nm": [0.0, -0.5],
    # etendue = solid angle x area holds to a few degrees (background.py): 1e5 urad
    "fov_urad": [0.0, 1.0e5 + 1.0, 1e7],
    # the decoy bounds take mean photon numbers up to MAX_MEAN_PHOTON_NUMBER (bb84.py)
    "mu": [0.0, -0.5, MAX_MEAN_PHOTON_NUMBER * 1.01],
    "nu": [0.0, 0.5, 0.6],  # the default mu is 0.5: the decoy must be weaker
    "misalignment": [-0.01, 0.51],
    "ec_efficiency": [0.99, 3.5],
    "block_pulses": [10.0, 1e19],
    "modulation_variance": [0.0, -1.0, 1e4],
    "excess_noise": [-0.01, 11.0],
    "electronic_noise": [-0.01, 11.0],
    "reconciliation_efficiency": [0.0, 1.01],
    "detection": ["direct", "", None],
}
_NON_NUMERIC = {"protocol", "turbulence", "detection", "detectors"}

PLATFORM_BAD: dict[str, list[object]] = {
    "latitude_deg": [-90.1, 90.1],
    "longitude_deg": [-180.1, 180.1],
    "altitude_m": [999.0, 1.1e8, -5.0],
    "station_keeping_radius_m": [-1.0, 200_001.0],
    "on_station_hours": [
        [22, 4],  # a window written flat, not as a pair in a list
        5,
        "22-4",
        None,
        [[1, 2, 3]],
        [[1]],
        [[25, 1]],
        [[-1, 3]],
        [[math.nan, 3]],
        [["6", 18]],
        [[True, 3]],
        ["ab"],
    ],
}

STATION_BAD: dict[str, list[object]] = {
    "latitude_deg": [-91.0, 91.0],
    "longitude_deg": [-181.0, 181.0],
    # geometry.Site takes heights above -500 m; 9 km is above every ground station
    "height_m": [-500.0, -600.0, 9001.0],
    # background.sky_radiance interpolates log(radiance): both > 0, night <= day
    "day_radiance": [0.0, -0.03],
    "night_radiance": [0.0, -1e-7, 0.031],  # 0.031 is above the default day (0.03)
    "clear_sky": [1.5, -0.1, "0.7", None, True, [0.5] * 11, [0.5] * 13, {"jan": 0.5}],
    "mean_cloud_spell_s": [-1.0],
}
_STATION_NON_NUMERIC = {"clear_sky"}

PLATFORM_REQUIRED = {"latitude_deg": 57.1, "longitude_deg": 11.4}
STATION_REQUIRED = {"latitude_deg": 57.3, "longitude_deg": 11.2}


def _cases(table: dict[str, list[object]], non_numeric: set[str]) -> list[tuple[str, object]]:
    out = []
    for name, values in table.items():
        extra = [] if name in non_numeric else NOT_NUMBERS
        if name == "block_pulses":  # None is its valid "asymptotic"
            extra = [x for x in extra if x is not None]
        out += [(name, v) for v in values + [x for x in extra if x not in values]]
    return out


def _refuses(kind: type[Any], base: dict[str, Any], name: str, value: object) -> None:
    with pytest.raises(ValueError, match=rf"^{name} ") as caught:
        kind(**(base | {name: value}))
    # The message names the field first; the same through the mapping reader.
    assert caught.value.args[0].split(" ", 1)[0] == name
    with pytest.raises(ValueError, match=rf"^{name} "):
        from_mapping(kind, base | {name: value})


def test_every_field_has_refusal_cases() -> None:
    """A field added without range cases fails here, so no field goes unchecked."""
    assert set(OPTICS_BAD) == {f.name for f in dataclasses.fields(LinkOptics)}
    assert set(PLATFORM_BAD) == {f.name for f in dataclasses.fields(Platform)}
    assert set(STATION_BAD) == {f.name for f in dataclasses.fields(StationSky)}


@pytest.mark.parametrize(("name", "value"), _cases(OPTICS_BAD, _NON_NUMERIC))
def test_link_optics_refuses_each_field_out_of_range(name: str, value: object) -> None:
    _refuses(LinkOptics, {}, name, value)


@pytest.mark.parametrize(("name", "value"), _cases(PLATFORM_BAD, {"on_station_hours"}))
def test_platform_refuses_each_field_out_of_range(name: str, value: object) -> None:
    _refuses(Platform, PLATFORM_REQUIRED, name, value)


@pytest.mark.parametrize(("name", "value"), _cases(STATION_BAD, _STATION_NON_NUMERIC))
def test_station_sky_refuses_each_field_out_of_range(name: str, value: object) -> None:
    _refuses(StationSky, STATION_REQUIRED, name, value)


@pytest.mark.parametrize(
    ("name", "value"),
    [
        ("zenith_transmittance", 1.0),
        ("misalignment", 0.0),
        ("misalignment", 0.5),
        ("ec_efficiency", 1.0),
        ("detectors", 1),
        ("detectors", 16),
        ("pointing_jitter_urad", 0.0),
        ("dark_count_rate_hz", 0.0),
        ("block_pulses", 1e3),
        ("block_pulses", None),
        ("excess_noise", 0.0),
        ("mu", MAX_MEAN_PHOTON_NUMBER),
        ("fov_urad", 1e5),
        ("protocol", "cv-gg02"),
        ("detection", "heterodyne"),
    ],
)
def test_link_optics_takes_the_ends_of_its_ranges(name: str, value: object) -> None:
    """The ranges are closed where the docstring says so (a bound that refused its own
    end would refuse a valid link)."""
    given: dict[str, Any] = {name: value}
    optics = LinkOptics(**given)
    assert getattr(optics, name) == value


def test_protocol_is_read_from_its_string() -> None:
    assert LinkOptics(protocol="cv-gg02").protocol is Protocol.CV_GG02  # type: ignore[arg-type]
    assert LinkOptics().protocol is Protocol.DECOY_BB84


def test_unit_conversions() -> None:
    optics = LinkOptics(wavelength_nm=1550.0, divergence_urad=12.5, pointing_jitter_urad=0.5)
    assert optics.wavelength_m == pytest.approx(1.55e-6, rel=1e-15)
    assert optics.divergence_rad == pytest.approx(12.5e-6, rel=1e-15)
    assert optics.jitter_rad == pytest.approx(0.5e-6, rel=1e-15)


# ---------------------------------------------------------------- from_mapping


@pytest.mark.parametrize("kind", [LinkOptics, Platform, StationSky])
def test_from_mapping_refuses_unknown_names(kind: type[Any]) -> None:
    base = {} if kind is LinkOptics else dict(PLATFORM_REQUIRED)
    with pytest.raises(ValueError, match=r"^unknown field 'aperture'; known: ") as caught:
        from_mapping(kind, base | {"aperture": 0.3})
    # every known name is listed, so the operator sees the spelling
    for field in dataclasses.fields(kind):
        assert field.name in caught.value.args[0]


def test_from_mapping_names_the_first_unknown_of_several_in_order() -> None:
    with pytest.raises(ValueError, match=r"^unknown field 'b_extra'"):
        from_mapping(LinkOptics, {"z_extra": 1, "b_extra": 2})


@pytest.mark.parametrize(
    ("kind", "given", "missing"),
    [
        (Platform, {"longitude_deg": 3.0}, "latitude_deg"),
        (Platform, {"latitude_deg": 3.0}, "longitude_deg"),
        (Platform, {}, "latitude_deg"),
        (StationSky, {"latitude_deg": 3.0, "height_m": 10.0}, "longitude_deg"),
    ],
)
def test_from_mapping_names_the_missing_required_field(
    kind: type[Any], given: dict[str, Any], missing: str
) -> None:
    with pytest.raises(ValueError, match=rf"^missing required field '{missing}'$"):
        from_mapping(kind, given)


def test_from_mapping_round_trips_every_record_through_json() -> None:
    """A record written as JSON (``dataclasses.asdict``, tuples become lists) and read back
    is the same record: the registry, network description and emulator share the format."""
    records: list[Any] = [
        LinkOptics(protocol=Protocol.CV_GG02, block_pulses=1e10, turbulence=True),
        Platform(10.0, 20.0, 18_000.0, 5_000.0, ((22.0, 4.0), (10.5, 12.0))),
        StationSky(10.1, 20.1, 300.0, clear_sky=[0.08 * m for m in range(12)]),
    ]
    for record in records:
        text = json.dumps(dataclasses.asdict(record))
        assert from_mapping(type(record), json.loads(text)) == record


# ---------------------------------------------------------------- clear sky


def test_clear_sky_number_fills_the_table() -> None:
    sky = StationSky(0.0, 0.0, clear_sky=0.35)
    assert len(sky.clear_sky) == 12
    assert all(row == (0.35,) * 24 for row in sky.clear_sky)
    assert StationSky(0.0, 0.0, clear_sky=1).clear_probability(7, 3) == 1.0


def test_clear_sky_twelve_numbers_are_months() -> None:
    monthly = [0.05 * (m + 1) for m in range(12)]
    sky = StationSky(0.0, 0.0, clear_sky=monthly)
    for month in range(1, 13):
        for hour in range(24):
            assert sky.clear_probability(month, hour) == monthly[month - 1]


def test_clear_sky_twelve_by_twenty_four_is_month_and_hour() -> None:
    """Each cell distinct, so a transposed or shifted lookup cannot pass."""
    table = [[(24 * m + h) / 1000.0 for h in range(24)] for m in range(12)]
    sky = StationSky(0.0, 0.0, clear_sky=table)
    for month in range(1, 13):
        for hour in range(24):
            assert sky.clear_probability(month, hour) == table[month - 1][hour]
    # hours wrap modulo 24 (an hour 24 is the next day's 0)
    assert sky.clear_probability(5, 24) == table[4][0]


@pytest.mark.parametrize(
    ("value", "month_named"),
    [
        ([[0.5] * 24] * 11 + [[0.5] * 23], "month 12"),
        ([[0.5] * 24] * 3 + [[0.5] * 25] + [[0.5] * 24] * 8, "month 4"),
        ([[0.5] * 24] * 5 + [[0.5] * 23 + [1.2]] + [[0.5] * 24] * 6, "month 6"),
        ([[0.5] * 24] * 11 + [[0.5] * 23 + [math.nan]], "month 12"),
        ([0.5] * 11 + ["x"], "month 12"),
        ([[0.5] * 24] * 12 + [[0.5] * 24], None),  # 13 rows
        ([[0.5] * 24] * 11, None),  # 11 rows
        ([[0.5] * 12] * 24, None),  # transposed: 24 rows of 12
        ("0.5", None),
    ],
)
def test_clear_sky_refuses_other_shapes(value: object, month_named: str | None) -> None:
    with pytest.raises(ValueError, match=r"^clear_sky must be ") as caught:
        StationSky(0.0, 0.0, clear_sky=value)
    if month_named is not None:
        assert month_named + " is not" in caught.value.args[0]


# ---------------------------------------------------------------- on station


def _covered_minutes(windows: list[tuple[float, float]]) -> set[int]:
    """The minutes of the UTC day [0, 1440) a list of [start, end) windows covers, by
    expanding each window (a wrapped one as [start, 24) and [0, end)) into minutes."""
    out: set[int] = set()
    for start, end in windows:
        pieces = [(start, end)] if start <= end else [(start, 24.0), (0.0, end)]
        for low, high in pieces:
            out |= {m for m in range(1440) if low * 60 <= m < high * 60}
    return out


@pytest.mark.parametrize(
    "windows",
    [
        [(6.0, 18.0)],
        [(22.0, 4.0)],
        [(0.0, 24.0)],
        [(23.0, 1.0), (11.0, 13.5)],
        [(1.0, 2.0), (20.0, 24.0)],
        [(5.0, 5.0)],  # an empty window
    ],
)
def test_on_station_matches_the_windows_minute_by_minute(
    windows: list[tuple[float, float]],
) -> None:
    platform = Platform(0.0, 0.0, on_station_hours=tuple(windows))
    covered = _covered_minutes(windows)
    for minute in range(1440):
        assert platform.on_station(minute / 60.0) is (minute in covered), minute


def test_wrapped_window_edges() -> None:
    """(22, 4): on from 22:00 inclusive through midnight to 04:00 exclusive."""
    platform = Platform(0.0, 0.0, on_station_hours=((22, 4),))
    on = [22.0, 22.5, 23.99, 0.0, 2.0, 3.99]
    off = [21.99, 4.0, 4.01, 12.0]
    assert all(platform.on_station(h) for h in on)
    assert not any(platform.on_station(h) for h in off)


def test_no_windows_means_always_on_station() -> None:
    platform = Platform(0.0, 0.0)
    assert platform.on_station_hours == ()
    assert all(platform.on_station(m / 60.0) for m in range(1440))


@given(
    st.lists(
        st.tuples(st.integers(0, 24), st.integers(0, 24)).map(lambda w: (float(w[0]), float(w[1]))),
        max_size=4,
    )
)
def test_on_station_any_whole_hour_windows(windows: list[tuple[float, float]]) -> None:
    platform = Platform(0.0, 0.0, on_station_hours=tuple(windows))
    covered = _covered_minutes(windows) if windows else set(range(1440))
    for hour in range(24):
        assert platform.on_station(hour + 0.5) is (hour * 60 + 30 in covered)


def test_windows_from_json_lists_become_float_pairs() -> None:
    platform = from_mapping(Platform, PLATFORM_REQUIRED | {"on_station_hours": [[22, 4], [9, 10]]})
    assert platform.on_station_hours == ((22.0, 4.0), (9.0, 10.0))
