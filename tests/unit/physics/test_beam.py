"""Gaussian beams, capture, pointing and dB (``keystrata_physics.beam``).

Outside references: Siegman, *Lasers* (1986), ch. 17, for the beam formulas (checked by
values worked by hand below); scipy (PyPI) for independent numerical integrals of the
Gaussian intensity over a disc and for the noncentral chi-square distribution, which gives
the power an offset disc collects; Monte Carlo over Gaussian pointing errors; 20 log10 2 =
6.0206 dB for a doubled distance.
"""

from __future__ import annotations

import math
import random
from collections.abc import Callable

import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import integrate, stats

from keystrata_physics import atmosphere, geometry
from keystrata_physics.beam import (
    beam_radius_m,
    capture_fraction,
    divergence_from_waist_rad,
    fraction_from_db,
    jittered_beam_radius_m,
    loss_db,
    pointing_factor,
    rayleigh_range_m,
    waist_from_divergence_m,
)

LAMBDA = 850e-9


def offset_capture(aperture_diameter_m: float, beam_radius: float, offset_m: float) -> float:
    """Power fraction in a disc whose centre is ``offset_m`` from the beam axis.

    The normalised intensity (2 / (pi w^2)) exp(-2 r^2 / w^2) is a 2-D normal density with
    standard deviation w / 2 per axis, so |X|^2 / (w/2)^2 is noncentral chi-square with
    2 degrees of freedom and noncentrality (offset / (w/2))^2 (scipy.stats.ncx2).
    """
    sigma = beam_radius / 2.0
    a = aperture_diameter_m / 2.0
    return float(stats.ncx2.cdf((a / sigma) ** 2, 2, (offset_m / sigma) ** 2))


# ---------------------------------------------------------------- beam formulas


def test_waist_and_rayleigh_range_worked_by_hand() -> None:
    """850 nm, 10 microradian half-angle divergence: w0 = lambda / (pi theta)
    = 850e-9 / (3.14159265 x 1e-5) = 2.70563e-2 m; z_R = pi w0^2 / lambda
    = 3.14159265 x 7.32045e-4 / 850e-9 = 2705.63 m (Siegman 1986, ch. 17)."""
    w0 = waist_from_divergence_m(10e-6, LAMBDA)
    assert w0 == pytest.approx(2.70563e-2, rel=1e-5)
    assert rayleigh_range_m(w0, LAMBDA) == pytest.approx(2705.63, rel=1e-5)
    assert divergence_from_waist_rad(w0, LAMBDA) == pytest.approx(10e-6, rel=1e-12)


def test_beam_radius_at_the_waist_the_rayleigh_range_and_far_away() -> None:
    w0 = 0.02
    z_r = rayleigh_range_m(w0, LAMBDA)
    assert beam_radius_m(w0, LAMBDA, 0.0) == w0
    # At z = z_R the radius is sqrt(2) w0 (Siegman 1986, ch. 17).
    assert beam_radius_m(w0, LAMBDA, z_r) == pytest.approx(math.sqrt(2.0) * w0, rel=1e-12)
    # Far field: w(z) -> theta z.
    theta = divergence_from_waist_rad(w0, LAMBDA)
    assert beam_radius_m(w0, LAMBDA, 1000 * z_r) == pytest.approx(theta * 1000 * z_r, rel=1e-6)


@given(
    waist=st.floats(1e-3, 0.2),
    z=st.floats(0.0, 1e6),
    factor=st.floats(1.01, 10.0),
)
def test_capture_falls_with_distance(waist: float, z: float, factor: float) -> None:
    z_far = z * factor + 1.0
    near = capture_fraction(0.3, beam_radius_m(waist, LAMBDA, z))
    far = capture_fraction(0.3, beam_radius_m(waist, LAMBDA, z_far))
    assert far <= near
    if near < 0.999 and z_far - z > 0.01 * rayleigh_range_m(waist, LAMBDA):
        assert far < near


@given(waist=st.floats(5e-3, 0.05), ratio=st.floats(1e3, 1e5))
def test_doubling_a_far_field_distance_costs_6_02_db(waist: float, ratio: float) -> None:
    # Far field, footprint >> aperture: capture ~ 2 a^2 / (theta z)^2, so a doubled
    # distance costs 20 log10(2) = 6.0206 dB (physics.md; any optics handbook).
    z = ratio * rayleigh_range_m(waist, LAMBDA)
    one = loss_db(capture_fraction(0.2, beam_radius_m(waist, LAMBDA, z)))
    two = loss_db(capture_fraction(0.2, beam_radius_m(waist, LAMBDA, 2 * z)))
    assert two - one == pytest.approx(20 * math.log10(2), abs=0.01)


# ---------------------------------------------------------------- capture


@pytest.mark.parametrize(("diameter", "w"), [(0.4, 0.399), (0.1, 1.0), (1.0, 0.1), (0.02, 3.0)])
def test_capture_fraction_matches_a_numerical_integral(diameter: float, w: float) -> None:
    # scipy.integrate.dblquad of the normalised Gaussian intensity over the disc.
    a = diameter / 2

    def intensity(r: float, _phi: float) -> float:
        return 2 / (math.pi * w * w) * math.exp(-2 * r * r / (w * w)) * r

    value, _ = integrate.dblquad(intensity, 0, 2 * math.pi, 0, a, epsabs=1e-13, epsrel=1e-11)
    assert capture_fraction(diameter, w) == pytest.approx(value, rel=1e-8)


def test_capture_fraction_is_the_area_ratio_for_a_large_footprint() -> None:
    # For w >> a: 2 a^2 / w^2, the aperture over a flat-top disc of radius w / sqrt(2).
    # (physics.md's (D_rx / D_footprint)^2 with D_footprint = 2 w is half of this: 3 dB.)
    assert capture_fraction(0.01, 10.0) == pytest.approx(2 * 0.005**2 / 100.0, rel=1e-6)
    assert capture_fraction(1e-3, 100.0) > 0.0  # expm1 keeps tiny fractions


def test_offset_capture_helper_matches_a_direct_integral() -> None:
    # The ncx2 helper used below against a plain 2-D integral of the offset Gaussian.
    w, d, offset = 0.5, 0.4, 0.3

    def intensity(r: float, phi: float) -> float:
        x, y = r * math.cos(phi) - offset, r * math.sin(phi)
        return 2 / (math.pi * w * w) * math.exp(-2 * (x * x + y * y) / (w * w)) * r

    value, _ = integrate.dblquad(intensity, 0, 2 * math.pi, 0, d / 2, epsabs=1e-12)
    assert offset_capture(d, w, offset) == pytest.approx(value, rel=1e-7)


# ---------------------------------------------------------------- pointing


@pytest.mark.parametrize(("theta", "s"), [(10e-6, 2e-6), (10e-6, 5e-6), (20e-6, 1e-6)])
def test_pointing_factor_is_the_rayleigh_average_of_the_gaussian_capture(
    theta: float, s: float
) -> None:
    """Independent check of the docstring's derivation: average the exact offset capture
    (noncentral chi-square) of a small aperture over a Rayleigh-distributed angular
    offset with scipy.integrate.quad, far field at z = 40 km."""
    z, d = 40e3, 0.01
    w = theta * z

    def weighted(rho: float) -> float:
        rayleigh = rho / (s * s) * math.exp(-rho * rho / (2 * s * s))
        return rayleigh * offset_capture(d, w, rho * z)

    mean, _ = integrate.quad(weighted, 0, 12 * s, epsabs=1e-16, epsrel=1e-10)
    centred = capture_fraction(d, w)
    assert mean / centred == pytest.approx(pointing_factor(theta, s), rel=1e-3)


def test_jittered_radius_is_exact_for_any_aperture_by_monte_carlo() -> None:
    """Monte Carlo: Gaussian pointing errors per axis (sigma = jitter at the receiver),
    exact offset capture of a large aperture (0.8 m in a 0.4 m beam), 20,000 draws with a
    fixed seed; standard error about 0.2 % of the mean."""
    rng = random.Random(20261203)
    w, d, jitter = 0.4, 0.8, 0.15
    draws = [
        offset_capture(d, w, math.hypot(rng.gauss(0, jitter), rng.gauss(0, jitter)))
        for _ in range(20_000)
    ]
    mean = math.fsum(draws) / len(draws)
    expected = capture_fraction(d, jittered_beam_radius_m(w, jitter))
    assert mean == pytest.approx(expected, rel=0.01)
    # ... and the small-aperture factor would be wrong here: it is not the same number.
    assert capture_fraction(d, w) * pointing_factor(w, jitter) < 0.97 * expected


def test_no_jitter_no_loss() -> None:
    assert pointing_factor(10e-6, 0.0) == 1.0
    assert jittered_beam_radius_m(0.3, 0.0) == 0.3


@given(theta=st.floats(1e-6, 1e-3), s=st.floats(1e-8, 1e-4), more=st.floats(1.01, 10.0))
def test_more_jitter_loses_more(theta: float, s: float, more: float) -> None:
    assert pointing_factor(theta, s * more) < pointing_factor(theta, s) < 1.0


# ---------------------------------------------------------------- dB


def test_db_values() -> None:
    # 10 log10 2 = 3.0103 dB; 10 dB is a tenth (definition of the decibel).
    assert loss_db(0.5) == pytest.approx(3.0103, abs=1e-4)
    assert loss_db(1.0) == 0.0
    assert fraction_from_db(10.0) == pytest.approx(0.1, rel=1e-12)
    assert fraction_from_db(0.0) == 1.0


@given(st.floats(1e-30, 1.0))
def test_db_round_trip(fraction: float) -> None:
    assert fraction_from_db(loss_db(fraction)) == pytest.approx(fraction, rel=1e-12)


# ---------------------------------------------------------------- errors


@pytest.mark.parametrize(
    ("call", "field"),
    [
        (lambda: rayleigh_range_m(0.0, LAMBDA), "waist_radius_m must be > 0"),
        (lambda: rayleigh_range_m(0.01, -1.0), "wavelength_m"),
        (lambda: waist_from_divergence_m(math.nan, LAMBDA), "divergence_rad"),
        (lambda: divergence_from_waist_rad(-0.1, LAMBDA), "waist_radius_m"),
        (lambda: beam_radius_m(0.01, LAMBDA, -1.0), "distance_m"),
        (lambda: capture_fraction(-0.1, 1.0), "aperture_diameter_m must be > 0"),
        (lambda: capture_fraction(0.1, math.inf), "beam_radius_m"),
        (lambda: pointing_factor(0.0, 1e-6), "divergence_rad"),
        (lambda: pointing_factor(1e-5, -1e-6), "jitter_rad"),
        (lambda: jittered_beam_radius_m(0.1, -1.0), "jitter_m"),
        (lambda: loss_db(0.0), "fraction"),
        (lambda: loss_db(1.5), "fraction"),
        (lambda: fraction_from_db(-3.0), "loss_db"),
        (lambda: fraction_from_db(True), "loss_db"),
    ],
)
def test_bad_input_is_refused_by_name(call: Callable[[], object], field: str) -> None:
    with pytest.raises(ValueError, match=field):
        call()


# ---------------------------------------------------------------- a whole downlink


def test_worked_downlink_budget_from_20_km() -> None:
    """A downlink from a platform at 20 km to a sea-level station at 30 degrees elevation,
    every step worked by hand (inputs invented for the example):

    - range (test_geometry): L = 39,814 m.
    - beam: 850 nm, 10 urad half-angle: w0 = 27.056 mm, z_R = 2705.6 m,
      w(L) = w0 sqrt(1 + (39814 / 2705.6)^2) = 0.027056 x sqrt(1 + 216.54) = 0.39906 m.
    - capture, 0.40 m telescope (a = 0.2 m): 1 - exp(-2 x 0.04 / 0.159248)
      = 1 - exp(-0.502361) = 0.39490, 4.035 dB.
    - pointing, 2 urad rms per axis: 100 / (100 + 4 x 4) = 0.86207, 0.645 dB.
    - air, zenith transmittance 0.8 (an input), Kasten-Young air mass at 30 degrees:
      1 / (0.5 + 0.50572 x 36.07995^-1.6364) = 1 / (0.5 + 0.50572 x 0.0028294) = 1.99429;
      0.8^1.99429 = exp(-0.223144 x 1.99429) = 0.64082, 1.933 dB.
    - total without turbulence and receiver: 4.035 + 0.645 + 1.933 = 6.612 dB.
    """
    distance = geometry.slant_range_m(30.0, 0.0, 20_000.0)
    w0 = waist_from_divergence_m(10e-6, LAMBDA)
    w = beam_radius_m(w0, LAMBDA, distance)
    assert w == pytest.approx(0.39906, rel=1e-4)
    captured = capture_fraction(0.40, w)
    assert captured == pytest.approx(0.39490, rel=1e-4)
    pointing = pointing_factor(10e-6, 2e-6)
    assert pointing == pytest.approx(0.86207, rel=1e-5)
    air = atmosphere.transmittance(0.8, 30.0)
    assert air == pytest.approx(0.64082, rel=1e-4)
    total = loss_db(captured) + loss_db(pointing) + loss_db(air)
    assert total == pytest.approx(6.612, abs=0.002)
    # Turbulence on a downlink: the layers sit next to the receiver; a few per cent only.
    turbulence = atmosphere.turbulence_factor(
        w0, LAMBDA, 60.0, transmitter_height_m=20_000.0, receiver_height_m=0.0
    )
    assert 0.9 < turbulence < 1.0
