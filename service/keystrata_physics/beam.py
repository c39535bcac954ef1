"""Gaussian beams and how much of one a receiver collects.

Siegman, *Lasers* (University Science Books, 1986), chapter 17: a TEM00 beam of waist
radius w0 (1/e^2 intensity radius) at wavelength lambda has the Rayleigh range
z_R = pi w0^2 / lambda, the radius w(z) = w0 sqrt(1 + (z / z_R)^2) at a distance z from
its waist, and the far-field half-angle divergence theta = lambda / (pi w0), so that
w(z) ~ theta z for z >> z_R. Its intensity at a distance r from the axis is
I(r) = (2 P / (pi w^2)) exp(-2 r^2 / w^2).

Conventions of the package: radii are 1/e^2 intensity radii, divergences far-field
half-angles in radians, losses in dB positive.
"""

from __future__ import annotations

import math


def _positive(name: str, value: float, unit: str = "") -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ValueError(f"{name} must be a number, got {value!r}")
    if not (math.isfinite(value) and value > 0.0):
        raise ValueError(f"{name} must be > 0{unit} and finite, got {value!r}")
    return float(value)


def _non_negative(name: str, value: float) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ValueError(f"{name} must be a number, got {value!r}")
    if not (math.isfinite(value) and value >= 0.0):
        raise ValueError(f"{name} must be >= 0 and finite, got {value!r}")
    return float(value)


def rayleigh_range_m(waist_radius_m: float, wavelength_m: float) -> float:
    """Rayleigh range z_R = pi w0^2 / lambda in metres (Siegman 1986, ch. 17).

    Raises ValueError unless both inputs are finite and > 0.
    """
    w0 = _positive("waist_radius_m", waist_radius_m)
    wavelength = _positive("wavelength_m", wavelength_m)
    return math.pi * w0 * w0 / wavelength


def waist_from_divergence_m(divergence_rad: float, wavelength_m: float) -> float:
    """Waist radius w0 = lambda / (pi theta) of the beam whose far-field half-angle
    divergence is ``divergence_rad`` (Siegman 1986, ch. 17). Metres.

    Raises ValueError unless both inputs are finite and > 0.
    """
    theta = _positive("divergence_rad", divergence_rad)
    wavelength = _positive("wavelength_m", wavelength_m)
    return wavelength / (math.pi * theta)


def divergence_from_waist_rad(waist_radius_m: float, wavelength_m: float) -> float:
    """Far-field half-angle divergence theta = lambda / (pi w0) in radians of a beam of
    waist radius ``waist_radius_m`` (Siegman 1986, ch. 17).

    Raises ValueError unless both inputs are finite and > 0.
    """
    w0 = _positive("waist_radius_m", waist_radius_m)
    wavelength = _positive("wavelength_m", wavelength_m)
    return wavelength / (math.pi * w0)


def beam_radius_m(waist_radius_m: float, wavelength_m: float, distance_m: float) -> float:
    """1/e^2 radius w(z) = w0 sqrt(1 + (z / z_R)^2) at ``distance_m`` from the waist, metres.

    Raises ValueError unless the waist and wavelength are finite and > 0 and the
    distance is finite and >= 0.
    """
    z_r = rayleigh_range_m(waist_radius_m, wavelength_m)
    z = _non_negative("distance_m", distance_m)
    return float(waist_radius_m) * math.hypot(1.0, z / z_r)


def capture_fraction(aperture_diameter_m: float, beam_radius_m: float) -> float:
    """Fraction of a Gaussian beam's power inside a centred circular aperture.

    Integrating I(r) above over a disc of radius a = D / 2 gives 1 - exp(-2 a^2 / w^2)
    (Siegman 1986, ch. 17); computed with ``expm1`` so that the small fractions of a
    distant receiver keep their digits. When w >> a it tends to 2 a^2 / w^2, the ratio of
    the aperture's area to that of a flat-top disc of radius w / sqrt(2).

    Raises ValueError unless both inputs are finite and > 0.
    """
    radius = _positive("aperture_diameter_m", aperture_diameter_m) / 2.0
    w = _positive("beam_radius_m", beam_radius_m)
    return -math.expm1(-2.0 * radius * radius / (w * w))


def jittered_beam_radius_m(beam_radius_m: float, jitter_m: float) -> float:
    """1/e^2 radius of the time-averaged footprint of a beam whose centre wanders.

    With the beam centre offset by independent Gaussian errors of standard deviation
    ``jitter_m`` on each axis (at the receiver, so an angular jitter s at distance z is
    s z), the mean intensity is the beam profile convolved with that Gaussian. A Gaussian
    of 1/e^2 radius w has variance w^2 / 4 per axis, variances add, so the mean profile is
    Gaussian with radius sqrt(w^2 + 4 jitter^2). The mean collected fraction is then
    exactly ``capture_fraction(D, jittered_beam_radius_m(w, jitter))``.

    Raises ValueError unless ``beam_radius_m`` is finite and > 0 and ``jitter_m`` finite
    and >= 0.
    """
    w = _positive("beam_radius_m", beam_radius_m)
    jitter = _non_negative("jitter_m", jitter_m)
    return math.sqrt(w * w + 4.0 * jitter * jitter)


def pointing_factor(divergence_rad: float, jitter_rad: float) -> float:
    """Mean collected power with pointing jitter over that without, far field, small aperture.

    Derivation: the beam's angular offset from the receiver has independent Gaussian
    components of standard deviation s (``jitter_rad``) on each axis, so its magnitude
    rho is Rayleigh distributed, p(rho) = (rho / s^2) exp(-rho^2 / (2 s^2)). In the far
    field w = theta z, and an aperture much smaller than w collects in proportion to the
    local intensity, exp(-2 rho^2 / theta^2) times its on-axis value. The mean is
    int_0^inf (rho / s^2) exp(-rho^2 (1 / (2 s^2) + 2 / theta^2)) d rho
    = 1 / (1 + 4 s^2 / theta^2) = theta^2 / (theta^2 + 4 s^2).
    It is the small-aperture limit of ``jittered_beam_radius_m``, whose exact result for
    any aperture is ``capture_fraction`` with the radius sqrt(w^2 + 4 (s z)^2).

    Raises ValueError unless ``divergence_rad`` is finite and > 0 and ``jitter_rad``
    finite and >= 0.
    """
    theta = _positive("divergence_rad", divergence_rad)
    s = _non_negative("jitter_rad", jitter_rad)
    return theta * theta / (theta * theta + 4.0 * s * s)


def loss_db(fraction: float) -> float:
    """The loss in dB, -10 log10(fraction), of a power fraction in (0, 1]; positive.

    Raises ValueError when ``fraction`` is not in (0, 1].
    """
    if isinstance(fraction, bool) or not isinstance(fraction, int | float):
        raise ValueError(f"fraction must be a number, got {fraction!r}")
    if not 0.0 < fraction <= 1.0:
        raise ValueError(f"fraction must be in (0, 1], got {fraction!r}")
    return -10.0 * math.log10(fraction)


def fraction_from_db(loss_db: float) -> float:
    """The power fraction 10^(-loss / 10) that a loss of ``loss_db`` dB (>= 0) leaves.

    Raises ValueError unless ``loss_db`` is finite and >= 0.
    """
    loss = _non_negative("loss_db", loss_db)
    return math.pow(10.0, -loss / 10.0)
