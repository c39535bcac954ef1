"""Sky background (``keystrata_physics.background``).

Outside references: scipy.constants (PyPI, CODATA) for h and c; a hand-worked example
with every intermediate step; the solid angles of a hemisphere and a sphere; the
physics.md formula's proportionality in each input.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import constants

from keystrata_physics.background import (
    LIGHT_SPEED_M_S,
    PLANCK_J_S,
    background_counts_per_gate,
    cone_solid_angle_sr,
    sky_radiance,
)

DAY, NIGHT = 3e-2, 3e-9  # W m^-2 sr^-1 nm^-1: orders of magnitude from memory (physics.md)

RECEIVER = {
    "fov_full_angle_rad": 100e-6,
    "aperture_diameter_m": 0.3,
    "filter_width_nm": 1.0,
    "gate_s": 1e-9,
    "receiver_efficiency": 0.5,
    "wavelength_m": 850e-9,
}


def test_constants_are_the_si_values() -> None:
    # scipy.constants (CODATA; exact in the SI since 2019).
    assert constants.h == PLANCK_J_S
    assert constants.c == LIGHT_SPEED_M_S


# ---------------------------------------------------------------- counts


def test_counts_hand_worked_example() -> None:
    """Daytime sky 0.01 W m^-2 sr^-1 nm^-1, 100 urad full field of view, 0.30 m aperture,
    1 nm filter, 1 ns gate, efficiency 0.5, 850 nm; worked by hand:

    - half angle 50 urad; Omega = 2 pi (1 - cos 5e-5) = 2 pi x 1.25e-9 = 7.85398e-9 sr
      (1 - cos x = x^2 / 2 - x^4 / 24 = 1.25e-9 to 10 digits).
    - A = pi x 0.3^2 / 4 = 0.0706858 m^2.
    - power = 0.01 x 7.85398e-9 x 0.0706858 x 1 = 5.55165e-12 W.
    - energy in a gate = 5.55165e-21 J; detected (x 0.5) = 2.77583e-21 J.
    - photon energy h c / lambda = 6.62607015e-34 x 299792458 / 850e-9 = 2.33695e-19 J.
    - counts = 2.77583e-21 / 2.33695e-19 = 1.18780e-2 per gate.
    """
    assert cone_solid_angle_sr(100e-6) == pytest.approx(7.85398e-9, rel=1e-5)
    counts = background_counts_per_gate(0.01, **RECEIVER)
    assert counts == pytest.approx(1.18780e-2, rel=1e-4)


def test_cone_solid_angles() -> None:
    # A cone of full angle pi is a hemisphere, 2 pi sr; of 2 pi, the whole sphere, 4 pi sr.
    assert cone_solid_angle_sr(math.pi) == pytest.approx(2 * math.pi, rel=1e-15)
    assert cone_solid_angle_sr(2 * math.pi) == pytest.approx(4 * math.pi, rel=1e-15)
    # Small cones: pi (alpha / 2)^2, the area of the disc on the unit sphere.
    assert cone_solid_angle_sr(1e-6) == pytest.approx(math.pi * 0.25e-12, rel=1e-12)


def test_no_sky_no_counts() -> None:
    assert background_counts_per_gate(0.0, **RECEIVER) == 0.0


@given(
    name=st.sampled_from(
        ["filter_width_nm", "gate_s", "receiver_efficiency", "radiance", "aperture_diameter_m"]
    ),
    factor=st.floats(0.05, 1.0),
)
def test_counts_scale_linearly_or_as_the_area(name: str, factor: float) -> None:
    # N is proportional to H, d_lambda, t and eta, and to D^2 (physics.md formula).
    base = background_counts_per_gate(0.02, **RECEIVER)
    radiance = 0.02 * factor if name == "radiance" else 0.02
    changed = dict(RECEIVER)
    if name != "radiance":
        changed[name] = RECEIVER[name] * factor
    counts = background_counts_per_gate(radiance, **changed)
    expected = factor**2 if name == "aperture_diameter_m" else factor
    assert counts == pytest.approx(base * expected, rel=1e-12)


@given(fov=st.floats(1e-6, 1e-2), factor=st.floats(1.01, 4.0))
def test_counts_rise_with_the_field_of_view_as_its_solid_angle(fov: float, factor: float) -> None:
    small = background_counts_per_gate(0.02, **{**RECEIVER, "fov_full_angle_rad": fov})
    large = background_counts_per_gate(0.02, **{**RECEIVER, "fov_full_angle_rad": fov * factor})
    assert large > small
    # For small cones Omega ~ pi (alpha / 2)^2: quadratic in the full angle.
    assert large / small == pytest.approx(factor**2, rel=1e-4)


@given(wavelength=st.floats(400e-9, 2e-6), factor=st.floats(1.01, 2.0))
def test_longer_wavelengths_give_more_photons_per_watt(wavelength: float, factor: float) -> None:
    short = background_counts_per_gate(0.02, **{**RECEIVER, "wavelength_m": wavelength})
    long = background_counts_per_gate(0.02, **{**RECEIVER, "wavelength_m": wavelength * factor})
    assert long == pytest.approx(short * factor, rel=1e-12)


# ---------------------------------------------------------------- sky radiance


def test_sky_radiance_day_night_and_twilight() -> None:
    assert sky_radiance(30.0, day_w_m2_sr_nm=DAY, night_w_m2_sr_nm=NIGHT) == DAY
    assert sky_radiance(6.0, day_w_m2_sr_nm=DAY, night_w_m2_sr_nm=NIGHT) == DAY
    assert sky_radiance(-12.0, day_w_m2_sr_nm=DAY, night_w_m2_sr_nm=NIGHT) == NIGHT
    assert sky_radiance(-40.0, day_w_m2_sr_nm=DAY, night_w_m2_sr_nm=NIGHT) == NIGHT
    # Log-linear: halfway (-3 degrees) is the geometric mean, sqrt(3e-2 x 3e-9) = 3e-5.5.
    mid = sky_radiance(-3.0, day_w_m2_sr_nm=DAY, night_w_m2_sr_nm=NIGHT)
    assert mid == pytest.approx(math.sqrt(DAY * NIGHT), rel=1e-12)
    # A third of the way: night x (day / night)^(1/3), 7 orders of magnitude / 3.
    third = sky_radiance(-6.0, day_w_m2_sr_nm=DAY, night_w_m2_sr_nm=NIGHT)
    assert third == pytest.approx(NIGHT * 1e7 ** (1 / 3), rel=1e-12)


@given(low=st.floats(-90.0, 90.0), step=st.floats(0.0, 30.0))
def test_sky_radiance_never_falls_as_the_sun_rises(low: float, step: float) -> None:
    high = min(90.0, low + step)
    a = sky_radiance(low, day_w_m2_sr_nm=DAY, night_w_m2_sr_nm=NIGHT)
    b = sky_radiance(high, day_w_m2_sr_nm=DAY, night_w_m2_sr_nm=NIGHT)
    assert NIGHT <= a <= b * (1 + 1e-12) <= DAY * (1 + 1e-12)


# ---------------------------------------------------------------- errors


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"fov_full_angle_rad": 0.0}, "fov_full_angle_rad"),
        ({"fov_full_angle_rad": 7.0}, "fov_full_angle_rad"),
        ({"aperture_diameter_m": -0.1}, "aperture_diameter_m must be > 0"),
        ({"filter_width_nm": math.nan}, "filter_width_nm"),
        ({"gate_s": 0.0}, "gate_s"),
        ({"receiver_efficiency": 1.5}, "receiver_efficiency"),
        ({"receiver_efficiency": 0.0}, "receiver_efficiency"),
        ({"wavelength_m": math.inf}, "wavelength_m"),
    ],
)
def test_counts_refuse_bad_input(kwargs: dict[str, float], field: str) -> None:
    with pytest.raises(ValueError, match=field):
        background_counts_per_gate(0.01, **{**RECEIVER, **kwargs})


def test_counts_refuse_negative_radiance() -> None:
    with pytest.raises(ValueError, match="radiance_w_m2_sr_nm"):
        background_counts_per_gate(-1e-3, **RECEIVER)


@pytest.mark.parametrize(
    ("args", "kwargs", "field"),
    [
        ((95.0,), {}, "sun_elevation_deg"),
        ((0.0,), {"day_w_m2_sr_nm": 0.0}, "day_w_m2_sr_nm"),
        ((0.0,), {"night_w_m2_sr_nm": -1.0}, "night_w_m2_sr_nm"),
        ((0.0,), {"night_w_m2_sr_nm": 1.0}, "night_w_m2_sr_nm must not exceed"),
        ((0.0,), {"twilight_low_deg": 10.0}, "twilight_high_deg"),
        ((0.0,), {"twilight_low_deg": -100.0}, "twilight_low_deg"),
        ((0.0,), {"twilight_high_deg": math.nan}, "twilight_high_deg"),
    ],
)
def test_sky_radiance_refuses_bad_input(
    args: tuple[float], kwargs: dict[str, float], field: str
) -> None:
    values = {"day_w_m2_sr_nm": DAY, "night_w_m2_sr_nm": NIGHT, **kwargs}
    with pytest.raises(ValueError, match=field):
        sky_radiance(*args, **values)
