"""Extinction and turbulence (``keystrata_physics.atmosphere``).

Outside references: pvlib (PyPI), which implements the Kasten-Young 1989 and Pickering
2002 air-mass formulas; ambiance (PyPI), the ICAO 1993 standard atmosphere (identical to
the U.S. Standard Atmosphere 1976 below 32 km); scipy (PyPI) for adaptive quadrature and
the incomplete gamma function; the HV 5/7 model's defining values (r0 about 5 cm and
isoplanatic angle about 7 urad at 0.5 um, Andrews and Phillips 2005); Fried's definition
of r0 (JOSA 56, 1372 (1966)).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np
import pytest
from ambiance import Atmosphere
from hypothesis import given
from hypothesis import strategies as st
from pvlib.atmosphere import get_relative_airmass
from scipy import integrate, special

from keystrata_physics.atmosphere import (
    air_mass,
    fried_parameter_m,
    hufnagel_valley_cn2,
    pressure_ratio,
    transmittance,
    turbulence_factor,
)

ELEVATIONS = [0.0, 0.5, 2.0, 5.0, 10.0, 20.0, 30.0, 45.0, 60.0, 89.0, 90.0]
BREAKS = [100.0, 1_000.0, 10_000.0]


def _pvlib(model: str, elevation: float) -> float:
    return float(get_relative_airmass(np.array([90.0 - elevation]), model=model)[0])


# ---------------------------------------------------------------- air mass


@pytest.mark.parametrize("elevation", ELEVATIONS)
def test_air_mass_matches_pvlib_kasten_young(elevation: float) -> None:
    # pvlib.atmosphere.get_relative_airmass(model="kastenyoung1989"): the same published
    # formula implemented by others.
    assert air_mass(elevation) == pytest.approx(_pvlib("kastenyoung1989", elevation), rel=1e-9)


@pytest.mark.parametrize("elevation", ELEVATIONS)
def test_air_mass_agrees_with_an_independent_published_formula(elevation: float) -> None:
    # Pickering (2002), via pvlib: a different fit; within 0.2 % above 10 degrees and
    # 2.5 % at the horizon.
    tolerance = 0.002 if elevation >= 10.0 else 0.025
    assert air_mass(elevation) == pytest.approx(_pvlib("pickering2002", elevation), rel=tolerance)


def test_air_mass_at_the_zenith_and_the_horizon() -> None:
    # Kasten and Young (1989): their tabulated horizon air mass is 38.0868 (from memory),
    # the formula's stated error under 0.5 %; at the zenith the formula gives 0.9997.
    assert air_mass(90.0) == pytest.approx(1.0, abs=3e-4)
    assert air_mass(0.0) == pytest.approx(38.0868, rel=0.005)


@given(st.floats(20.0, 90.0))
def test_air_mass_is_near_plane_parallel_above_20_degrees(elevation: float) -> None:
    # physics.md: 1 / sin e is fair above about 20 degrees elevation.
    assert air_mass(elevation) == pytest.approx(1 / math.sin(math.radians(elevation)), rel=0.01)


# ---------------------------------------------------------------- transmittance


@pytest.mark.parametrize("height", [0.0, 500.0, 1_000.0, 2_400.0, 4_200.0, 8_000.0, 11_000.0])
def test_pressure_ratio_matches_the_standard_atmosphere(height: float) -> None:
    # ambiance.Atmosphere takes geometric heights, as pressure_ratio does.
    expected = float(Atmosphere(height).pressure[0]) / 101_325.0
    assert pressure_ratio(height) == pytest.approx(expected, rel=2e-5)


def test_transmittance_at_the_zenith_and_at_30_degrees() -> None:
    assert transmittance(0.8, 90.0) == pytest.approx(0.8 ** air_mass(90.0))
    # Worked in test_beam: 0.8 ** 1.99429 = 0.64082.
    assert transmittance(0.8, 30.0) == pytest.approx(0.64082, rel=1e-4)
    # A station at 2400 m: geopotential 6356766 x 2400 / 6359166 = 2399.09 m,
    # p/p0 = (1 - 0.0065 x 2399.09 / 288.15)^5.25588 = 0.945882^5.25588 = 0.74645 of the
    # column above it (U.S. Standard Atmosphere 1976, by hand), 0.8 ** (1.99429 x 0.74645).
    assert transmittance(0.8, 30.0, above_altitude_m=2_400.0) == pytest.approx(
        0.8 ** (air_mass(30.0) * pressure_ratio(2_400.0)), rel=1e-12
    )
    assert pressure_ratio(2_400.0) == pytest.approx(0.74645, abs=1e-5)


@given(
    t_z=st.floats(0.05, 0.99),
    low=st.floats(0.0, 89.0),
    step=st.floats(0.01, 20.0),
    height=st.floats(0.0, 5_000.0),
)
def test_transmittance_rises_with_elevation_and_station_height(
    t_z: float, low: float, step: float, height: float
) -> None:
    high = min(90.0, low + step)
    assert transmittance(t_z, high) > transmittance(t_z, low)
    assert transmittance(t_z, low, above_altitude_m=height + 100.0) > transmittance(
        t_z, low, above_altitude_m=height
    )


# ---------------------------------------------------------------- turbulence profile


def _closed_form_integral(low: float, high: float, v: float = 21.0, a: float = 1.7e-14) -> float:
    """int Cn^2 dh of HV in closed form: the exponentials directly, and
    int h^10 exp(-h/1000) dh = 1000^11 Gamma(11) P(11, h/1000) (scipy.special.gammainc)."""

    def tropo(h: float) -> float:
        return float(1000.0**11 * special.gamma(11) * special.gammainc(11, h / 1000.0))

    return (
        0.00594 * (v / 27) ** 2 * 1e-50 * (tropo(high) - tropo(low))
        + 2.7e-16 * 1500 * (math.exp(-low / 1500) - math.exp(-high / 1500))
        + a * 100 * (math.exp(-low / 100) - math.exp(-high / 100))
    )


def test_hv57_fried_parameter_is_about_5_cm_at_500_nm() -> None:
    # The "5" of HV 5/7: r0 about 5 cm at 0.5 um, zenith, whole atmosphere (Andrews and
    # Phillips 2005; common practice). Integrals above 30 km add nothing visible.
    r0 = fried_parameter_m(500e-9, 0.0, from_m=0.0, to_m=30_000.0)
    assert r0 == pytest.approx(0.05, rel=0.02)
    k = 2 * math.pi / 500e-9
    assert r0 == pytest.approx((0.423 * k * k * _closed_form_integral(0, 30_000)) ** -0.6, rel=1e-9)


def test_hv57_isoplanatic_angle_is_about_7_microradians() -> None:
    # The "7" of HV 5/7 checks the profile's upper layers: theta0 =
    # [2.914 k^2 int Cn^2 h^(5/3) dh]^(-3/5) (Andrews and Phillips 2005), scipy quad.
    k = 2 * math.pi / 500e-9
    moment, _ = integrate.quad(
        lambda h: hufnagel_valley_cn2(h) * h ** (5 / 3), 0, 30_000, points=BREAKS, limit=200
    )
    assert (2.914 * k * k * moment) ** -0.6 == pytest.approx(7e-6, rel=0.03)


@pytest.mark.parametrize(
    ("low", "high", "v", "a"),
    [
        (0, 20_000, 21, 1.7e-14),
        (2_000, 20_000, 21, 1.7e-14),
        (0, 500, 30, 1e-13),
        (5_000, 6_000, 21, 1.7e-14),
        (0, 100_000, 10, 0.0),
    ],
)
def test_fried_integral_matches_scipy_quad(low: float, high: float, v: float, a: float) -> None:
    wavelength, zenith = 850e-9, 40.0
    integral, _ = integrate.quad(
        lambda h: hufnagel_valley_cn2(h, v, a),
        low,
        high,
        points=[p for p in BREAKS if low < p < high],
        limit=400,
        epsabs=0,
        epsrel=1e-12,
    )
    k = 2 * math.pi / wavelength
    expected = (0.423 * k * k / math.cos(math.radians(zenith)) * integral) ** -0.6
    r0 = fried_parameter_m(wavelength, zenith, from_m=low, to_m=high, wind_mps=v, ground_cn2=a)
    assert r0 == pytest.approx(expected, rel=1e-8)


@given(wavelength=st.floats(400e-9, 2e-6), zenith=st.floats(0.0, 70.0))
def test_fried_parameter_scales_as_lambda_6_5_and_cos_zenith_3_5(
    wavelength: float, zenith: float
) -> None:
    # r0 proportional to lambda^(6/5) (cos zeta)^(3/5) (Fried 1966).
    base = fried_parameter_m(500e-9, 0.0, from_m=0.0, to_m=20_000.0)
    r0 = fried_parameter_m(wavelength, zenith, from_m=0.0, to_m=20_000.0)
    scale = (wavelength / 500e-9) ** 1.2 * math.cos(math.radians(zenith)) ** 0.6
    assert r0 == pytest.approx(base * scale, rel=1e-9)


# ---------------------------------------------------------------- beam spreading


def _reference_factor(
    w: float, wavelength: float, zenith: float, h_tx: float, h_rx: float
) -> float:
    """The docstring's model evaluated with scipy quad throughout."""
    span = abs(h_rx - h_tx)
    integral, _ = integrate.quad(
        lambda h: hufnagel_valley_cn2(h) * max(0.0, 1 - abs(h - h_tx) / span) ** (5 / 3),
        min(h_tx, h_rx),
        max(h_tx, h_rx),
        points=BREAKS,
        limit=400,
        epsrel=1e-12,
    )
    k = 2 * math.pi / wavelength
    sec = 1 / math.cos(math.radians(zenith))
    rho0 = (0.423 * k * k * sec * integral) ** -0.6
    z_r = math.pi * w * w / wavelength
    w_e = w / math.hypot(1, z_r / (span * sec))
    value, _ = integrate.quad(
        lambda x: math.exp(-x - 3.44 * (2 * x) ** (5 / 6) * (w_e / rho0) ** (5 / 3)),
        0,
        math.inf,
        epsrel=1e-12,
        limit=400,
    )
    return float(value)


@pytest.mark.parametrize("w", [0.003, 0.027, 0.05, 0.2])
@pytest.mark.parametrize(("h_tx", "h_rx"), [(0.0, 20_000.0), (20_000.0, 0.0), (0.0, 2_000.0)])
def test_turbulence_factor_matches_scipy(w: float, h_tx: float, h_rx: float) -> None:
    value = turbulence_factor(w, 850e-9, 50.0, transmitter_height_m=h_tx, receiver_height_m=h_rx)
    assert value == pytest.approx(_reference_factor(w, 850e-9, 50.0, h_tx, h_rx), rel=1e-6)


def test_uplink_seeing_limit_is_fried_definition() -> None:
    """A wide beam through ground turbulence: the on-axis long-term intensity is that of a
    beam limited by an aperture of diameter r0, factor -> r0^2 / (8 W^2): Fried (1966)
    defines r0 so that int MTF d^2f = (pi / 4) (r0 / lambda)^2, and the collimated beam's
    own int exp(-rho^2 / (2 W^2)) d^2rho is 2 pi W^2. The receiver is put 1e10 m away, deep
    in the far field, where the (1 - h / L)^(5/3) weight is 1 within 1e-5 in the layers
    that matter, so rho0 is the plain Fried r0."""
    far = 1e10
    r0 = fried_parameter_m(500e-9, 0.0, from_m=0.0, to_m=far)
    w = 80 * r0
    value = turbulence_factor(w, 500e-9, 0.0, transmitter_height_m=0.0, receiver_height_m=far)
    assert value * 8 * w * w / r0**2 == pytest.approx(1.0, rel=0.03)


def test_uplink_long_term_spread_is_about_the_seeing_angle() -> None:
    # Common practice: an uplink's long-term spread is about lambda / r0; the long-exposure
    # seeing FWHM is 0.98 lambda / r0 (from memory), a Gaussian 1/e^2 half-width of
    # 0.98 / sqrt(2 ln 2) = 0.83 lambda / r0. The equivalent Gaussian here, from the
    # on-axis factor: theta_LT = theta_diff / sqrt(factor), theta_diff = lambda / (pi W).
    wavelength = 850e-9
    r0 = fried_parameter_m(wavelength, 0.0, from_m=0.0, to_m=1e10)
    w = 0.5
    value = turbulence_factor(w, wavelength, 0.0, transmitter_height_m=0.0, receiver_height_m=1e10)
    theta_lt = wavelength / (math.pi * w) / math.sqrt(value)
    assert theta_lt == pytest.approx(0.83 * wavelength / r0, rel=0.12)


def test_downlink_from_20_km_is_close_to_one_and_uplink_is_not() -> None:
    # A 10 urad beam (w0 = 27 mm at 850 nm), 30 degrees elevation (zenith 60).
    down = turbulence_factor(
        0.027, 850e-9, 60.0, transmitter_height_m=20_000.0, receiver_height_m=0.0
    )
    up = turbulence_factor(
        0.027, 850e-9, 60.0, transmitter_height_m=0.0, receiver_height_m=20_000.0
    )
    assert 0.95 < down < 1.0
    assert up < 0.6


@given(
    w=st.floats(1e-3, 0.3),
    ground=st.floats(1e-16, 1e-13),
    more=st.floats(1.1, 10.0),
    zenith=st.floats(0.0, 70.0),
)
def test_more_turbulence_spreads_more(w: float, ground: float, more: float, zenith: float) -> None:
    def factor(a: float, h_tx: float, h_rx: float) -> float:
        return turbulence_factor(
            w, 850e-9, zenith, transmitter_height_m=h_tx, receiver_height_m=h_rx, ground_cn2=a
        )

    assert factor(ground * more, 0.0, 20_000.0) < factor(ground, 0.0, 20_000.0) <= 1.0
    assert factor(ground, 0.0, 20_000.0) < factor(ground, 20_000.0, 0.0)


# ---------------------------------------------------------------- errors


@pytest.mark.parametrize(
    ("call", "field"),
    [
        (lambda: air_mass(-1.0), "below the horizon"),
        (lambda: air_mass(91.0), "elevation_deg"),
        (lambda: transmittance(0.0, 30.0), "zenith_transmittance"),
        (lambda: transmittance(1.2, 30.0), "zenith_transmittance"),
        (lambda: transmittance(0.8, -5.0), "elevation_deg"),
        (lambda: transmittance(0.8, 30.0, above_altitude_m=12_000.0), "above_altitude_m"),
        (lambda: pressure_ratio(math.nan), "height_m"),
        (lambda: hufnagel_valley_cn2(-1.0), "height_m"),
        (lambda: hufnagel_valley_cn2(10.0, wind_mps=-1.0), "wind_mps"),
        (lambda: hufnagel_valley_cn2(10.0, ground_cn2=math.inf), "ground_cn2"),
        (lambda: fried_parameter_m(0.0, 0.0, from_m=0, to_m=1), "wavelength_m"),
        (lambda: fried_parameter_m(5e-7, 90.0, from_m=0, to_m=1), "zenith_angle_deg"),
        (lambda: fried_parameter_m(5e-7, 0.0, from_m=-1, to_m=1), "from_m"),
        (lambda: fried_parameter_m(5e-7, 0.0, from_m=10, to_m=10), "to_m"),
        (lambda: fried_parameter_m(5e-7, 0.0, from_m=0, to_m=1, wind_mps=math.nan), "wind_mps"),
        (
            lambda: turbulence_factor(-0.1, 5e-7, 0.0, transmitter_height_m=0, receiver_height_m=1),
            "waist_radius_m",
        ),
        (
            lambda: turbulence_factor(0.1, 5e-7, 0.0, transmitter_height_m=5, receiver_height_m=5),
            "receiver_height_m",
        ),
        (
            lambda: turbulence_factor(0.1, 5e-7, 0.0, transmitter_height_m=-5, receiver_height_m=5),
            "transmitter_height_m",
        ),
    ],
)
def test_bad_input_is_refused_by_name(call: Callable[[], object], field: str) -> None:
    with pytest.raises(ValueError, match=field):
        call()
