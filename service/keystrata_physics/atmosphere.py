"""The atmosphere between a ground station and a platform: extinction and turbulence.

Extinction: the zenith transmittance of the whole clear atmosphere is an input (site and
wavelength dependent, about 0.7-0.9 near 800-850 nm on a clear day, from memory) and is
raised to the relative air mass of Kasten and Young, Applied Optics 28, 4735 (1989).
A platform at about 20 km is above most of the air (about 95 % of its mass) and nearly
all the aerosol and water vapour, so the whole-atmosphere value is used as is for it,
which slightly understates the transmittance (common practice).

Turbulence: the Hufnagel-Valley 5/7 profile of the refractive-index structure constant
and the Fried parameter, as in Andrews and Phillips, *Laser Beam Propagation through
Random Media*, 2nd ed. (SPIE, 2005), with the plane-parallel sec(zenith) path. Heights
in the turbulence functions are above the station's ground, as the profile's are.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from keystrata_physics.checks import number as _number
from keystrata_physics.checks import positive as _positive

if TYPE_CHECKING:
    from collections.abc import Callable


def _elevation(value: float) -> float:
    elevation = _number("elevation_deg", value)
    if elevation < 0.0:
        raise ValueError(f"elevation_deg must be in [0, 90], got {value!r}: below the horizon")
    if elevation > 90.0:
        raise ValueError(f"elevation_deg must be in [0, 90], got {value!r}")
    return elevation


def _zenith(value: float) -> float:
    zenith = _number("zenith_angle_deg", value)
    if not 0.0 <= zenith < 90.0:
        raise ValueError(f"zenith_angle_deg must be in [0, 90), got {value!r}")
    return zenith


def _simpson(f: Callable[[float], float], a: float, b: float, n: int) -> float:
    """Composite Simpson rule over [a, b] with ``n`` (even) intervals."""
    step = (b - a) / n
    total = f(a) + f(b)
    total += 4.0 * math.fsum(f(a + (2 * i - 1) * step) for i in range(1, n // 2 + 1))
    total += 2.0 * math.fsum(f(a + 2 * i * step) for i in range(1, n // 2))
    return total * step / 3.0


# ---------------------------------------------------------------- extinction


def air_mass(elevation_deg: float) -> float:
    """Relative optical air mass at ``elevation_deg`` (0 at the horizon, 90 at the zenith).

    Kasten and Young, Applied Optics 28, 4735 (1989), eq. (3), in terms of the zenith
    angle z in degrees: m = 1 / (cos z + 0.50572 (96.07995 - z)^-1.6364). It fits
    their ray tracing through the ISO 2533 standard atmosphere, refraction included, to
    the horizon (about 38 there); above about 20 degrees elevation it is within 1 % of
    the plane-parallel 1 / sin(e).

    Raises ValueError when the elevation is outside [0, 90] degrees.
    """
    zenith = 90.0 - _elevation(elevation_deg)
    return 1.0 / (math.cos(math.radians(zenith)) + 0.50572 * math.pow(96.07995 - zenith, -1.6364))


#: U.S. Standard Atmosphere, 1976 (NOAA/NASA/USAF), lowest layer: sea-level temperature
#: (K), lapse rate (K per geopotential metre), g0 (m s^-2), molar mass of air (kg/mol),
#: gas constant (J mol^-1 K^-1) and the Earth radius it uses for geopotential (m).
_T0_K, _LAPSE_K_PER_M, _G0, _M0, _R_STAR, _R_GEOPOTENTIAL_M = (
    288.15,
    0.0065,
    9.80665,
    0.0289644,
    8.31432,
    6_356_766.0,
)
_TROPOPAUSE_M = 11_000.0


def pressure_ratio(height_m: float) -> float:
    """Air pressure at ``height_m`` (geometric, above sea level) over that at sea level.

    The lowest layer of the U.S. Standard Atmosphere, 1976: with the geopotential height
    H = r0 h / (r0 + h), p / p0 = (1 - L H / T0)^(g0 M0 / (R* L)), exponent 5.25588. By
    the hydrostatic balance it is also the fraction of the air column above that height.

    Raises ValueError when the height is not in (-500, 11000] m (the layer's extent).
    """
    return _pressure_ratio("height_m", height_m)


def _pressure_ratio(name: str, value: float) -> float:
    height = _number(name, value)
    if not -500.0 < height <= _TROPOPAUSE_M:
        raise ValueError(f"{name} must be in (-500, {_TROPOPAUSE_M:g}] m, got {value!r}")
    geopotential = _R_GEOPOTENTIAL_M * height / (_R_GEOPOTENTIAL_M + height)
    exponent = _G0 * _M0 / (_R_STAR * _LAPSE_K_PER_M)
    return math.pow(1.0 - _LAPSE_K_PER_M * geopotential / _T0_K, exponent)


def transmittance(
    zenith_transmittance: float, elevation_deg: float, *, above_altitude_m: float = 0.0
) -> float:
    """Clear-air transmittance of the path at ``elevation_deg`` above ``above_altitude_m``.

    T = T_zenith ** (air_mass(e) * p(h) / p0): the zenith optical depth of the whole
    atmosphere (``zenith_transmittance``, measured from sea level) scaled by the
    fraction of the air column above the station (``pressure_ratio``, U.S. Standard
    Atmosphere 1976) and by the Kasten-Young air mass. Scaling by pressure is right for
    molecular (Rayleigh) scattering; aerosols and water vapour fall off faster with
    height (scale heights of 1-2 km, from memory), so for a mountain station this
    understates the transmittance: a conservative estimate. Use the default 0 when the
    zenith value was measured at the station itself.

    Raises ValueError when ``zenith_transmittance`` is not in (0, 1], the elevation is
    outside [0, 90] degrees, or the altitude outside (-500, 11000] m.
    """
    t_z = _number("zenith_transmittance", zenith_transmittance)
    if not 0.0 < t_z <= 1.0:
        raise ValueError(f"zenith_transmittance must be in (0, 1], got {zenith_transmittance!r}")
    mass = air_mass(elevation_deg)
    column = _pressure_ratio("above_altitude_m", above_altitude_m)
    return math.pow(t_z, mass * column)


# ---------------------------------------------------------------- turbulence


def hufnagel_valley_cn2(
    height_m: float, wind_mps: float = 21.0, ground_cn2: float = 1.7e-14
) -> float:
    """Refractive-index structure constant Cn^2 (m^-2/3) at ``height_m`` above the ground.

    Hufnagel-Valley (Andrews and Phillips 2005, ch. 12):
    Cn^2(h) = 0.00594 (v / 27)^2 (1e-5 h)^10 exp(-h / 1000) + 2.7e-16 exp(-h / 1500)
    + A exp(-h / 100), with v the rms high-altitude wind speed (``wind_mps``) and A the
    ground-level value (``ground_cn2``). The defaults v = 21 m/s and A = 1.7e-14 m^-2/3
    are the HV 5/7 model (r0 about 5 cm and isoplanatic angle about 7 microradians at
    0.5 micrometres, zenith).

    Raises ValueError when the height is negative or not finite, the wind not finite
    and >= 0, or the ground value not finite and >= 0.
    """
    h = _number("height_m", height_m)
    if h < 0.0:
        raise ValueError(f"height_m must be >= 0, got {height_m!r}")
    v = _number("wind_mps", wind_mps)
    if v < 0.0:
        raise ValueError(f"wind_mps must be >= 0, got {wind_mps!r}")
    a = _number("ground_cn2", ground_cn2)
    if a < 0.0:
        raise ValueError(f"ground_cn2 must be >= 0, got {ground_cn2!r}")
    return (
        0.00594 * (v / 27.0) ** 2 * (1e-5 * h) ** 10 * math.exp(-h / 1000.0)
        + 2.7e-16 * math.exp(-h / 1500.0)
        + a * math.exp(-h / 100.0)
    )


#: The shortest height scale of the profile (its ground layer), and the number of
#: Simpson intervals over u = ln(1 + h / scale): steps of about 1.5 % of h + 100 m up to
#: 20 km, which resolve each exponential of the profile to about 1e-9 (the tests compare
#: with scipy's adaptive quad) at half a millisecond a call.
_CN2_SCALE_M = 100.0
_CN2_INTERVALS = 400


def _cn2_integral(
    from_m: float, to_m: float, cn2: Callable[[float], float], weight: Callable[[float], float]
) -> float:
    """int_{from}^{to} Cn^2(h) weight(h) dh, in u = ln(1 + h / 100 m), dh = (h + 100 m) du."""

    def integrand(u: float) -> float:
        h = _CN2_SCALE_M * math.expm1(u)
        return cn2(h) * weight(h) * (h + _CN2_SCALE_M)

    lower = math.log1p(from_m / _CN2_SCALE_M)
    upper = math.log1p(to_m / _CN2_SCALE_M)
    return _simpson(integrand, lower, upper, _CN2_INTERVALS)


def _heights(from_name: str, from_m: float, to_name: str, to_m: float) -> tuple[float, float]:
    low = _number(from_name, from_m)
    high = _number(to_name, to_m)
    if low < 0.0:
        raise ValueError(f"{from_name} must be >= 0, got {from_m!r}")
    if high < 0.0:
        raise ValueError(f"{to_name} must be >= 0, got {to_m!r}")
    return low, high


def _profile(wind_mps: float, ground_cn2: float) -> Callable[[float], float]:
    hufnagel_valley_cn2(0.0, wind_mps, ground_cn2)  # validates both, naming the field
    return lambda h: hufnagel_valley_cn2(h, wind_mps, ground_cn2)


def fried_parameter_m(
    wavelength_m: float,
    zenith_angle_deg: float,
    *,
    from_m: float,
    to_m: float,
    wind_mps: float = 21.0,
    ground_cn2: float = 1.7e-14,
) -> float:
    """Plane-wave Fried parameter r0 (metres) of the HV path between two heights.

    r0 = [0.423 k^2 sec(zeta) int_{from}^{to} Cn^2(h) dh]^(-3/5), k = 2 pi / lambda
    (Andrews and Phillips 2005, ch. 12): the coherence diameter seen by a receiver at the
    bottom looking up through the layer, e.g. from 0 to 20,000 m for a ground station and a
    platform at 20 km. The integral is a composite Simpson rule in u = ln(1 + h / 100 m).
    Plane-parallel path: fair to zenith angles of about 70 degrees.

    Raises ValueError when the wavelength is not > 0, the zenith angle not in [0, 90),
    a height negative, ``to_m`` not above ``from_m``, or the profile inputs invalid.
    """
    wavelength = _positive("wavelength_m", wavelength_m)
    zenith = _zenith(zenith_angle_deg)
    low, high = _heights("from_m", from_m, "to_m", to_m)
    if high <= low:
        raise ValueError(f"to_m must be above from_m ({low!r} m), got {to_m!r}")
    cn2 = _profile(wind_mps, ground_cn2)
    k = 2.0 * math.pi / wavelength
    integral = _cn2_integral(low, high, cn2, lambda _h: 1.0)
    return math.pow(0.423 * k * k / math.cos(math.radians(zenith)) * integral, -0.6)


#: Simpson intervals for the on-axis intensity integral, in t with x = t^6, up to where
#: the exponent reaches 60 (the integrand is then below 1e-26 of its scale).
_SPREAD_INTERVALS = 400
_SPREAD_EXPONENT = 60.0


def turbulence_factor(
    waist_radius_m: float,
    wavelength_m: float,
    zenith_angle_deg: float,
    *,
    transmitter_height_m: float,
    receiver_height_m: float,
    wind_mps: float = 21.0,
    ground_cn2: float = 1.7e-14,
) -> float:
    """Long-term mean on-axis intensity with turbulence over that without.

    The factor by which long-term beam spreading (beam wander plus short-term spread)
    lowers the power that a receiver much smaller than the footprint collects at the
    beam's nominal centre, for a Gaussian beam of 1/e^2 waist radius W
    (``waist_radius_m``) with its waist at the transmitter (collimated), over the slant
    path L = |h_rx - h_tx| sec(zeta).

    Model: the extended Huygens-Fresnel principle (Lutomirski and Yura, Applied Optics 10,
    1652 (1971); Andrews and Phillips 2005, ch. 6 and 12; from memory) gives the mean
    intensity at the receiver from the transmitted field's mutual coherence times
    exp(-D(rho) / 2), with the wave structure function D(rho) = 6.88 (rho / rho0)^(5/3)
    (Kolmogorov; Fried, JOSA 56, 1372 (1966)) and
    rho0 = [0.423 k^2 sec(zeta) int Cn^2(h) (1 - |h - h_tx| / |h_rx - h_tx|)^(5/3) dh]^(-3/5):
    turbulence counts fully at the transmitter and not at all at the receiver. On axis,
    integrating the beam's centroid coordinate out leaves a Gaussian in the separation rho
    of 1/e radius sqrt(2) W_e, W_e = W / sqrt(1 + (z_R / L)^2), z_R = pi W^2 / lambda
    (W_e = W in the far field), and with x = rho^2 / (2 W_e^2)
    factor = int_0^inf exp(-x) exp(-3.44 (2 x)^(5/6) (W_e / rho0)^(5/3)) dx.
    It tends to 1 when W_e << rho0 and to rho0^2 / (8 W_e^2) when W_e >> rho0, where the
    long-term spot is the seeing disc of an aperture of diameter rho0 (Fried's definition
    of r0).

    Uplink (transmitter on the ground): the turbulence is at the transmitter and the
    factor can be well below 1. Downlink from a platform: the turbulence is next to the
    receiver, rho0 is large and the factor is close to 1. Heights are above the station's
    ground (the HV profile's heights). Scintillation and the pointing loss are not
    included (see ``beam.pointing_factor``).

    Raises ValueError on a radius or wavelength not > 0, a zenith angle not in [0, 90),
    a negative height, equal heights, or invalid profile inputs.
    """
    w = _positive("waist_radius_m", waist_radius_m)
    wavelength = _positive("wavelength_m", wavelength_m)
    zenith = _zenith(zenith_angle_deg)
    h_tx, h_rx = _heights(
        "transmitter_height_m", transmitter_height_m, "receiver_height_m", receiver_height_m
    )
    if h_tx == h_rx:
        raise ValueError(f"receiver_height_m must differ from transmitter_height_m, got {h_rx!r}")
    cn2 = _profile(wind_mps, ground_cn2)
    span = abs(h_rx - h_tx)

    def weight(h: float) -> float:
        return math.pow(max(0.0, 1.0 - abs(h - h_tx) / span), 5.0 / 3.0)

    integral = _cn2_integral(min(h_tx, h_rx), max(h_tx, h_rx), cn2, weight)
    k = 2.0 * math.pi / wavelength
    sec_zenith = 1.0 / math.cos(math.radians(zenith))
    rho0 = math.pow(0.423 * k * k * sec_zenith * integral, -0.6)
    z_r = math.pi * w * w / wavelength
    w_e = w / math.hypot(1.0, z_r / (span * sec_zenith))
    c = 3.44 * 2.0 ** (5.0 / 6.0) * (w_e / rho0) ** (5.0 / 3.0)

    # x = t^6 makes (2 x)^(5/6) = 2^(5/6) t^5 smooth at the origin; dx = 6 t^5 dt.
    def integrand(t: float) -> float:
        t5 = t**5
        return 6.0 * t5 * math.exp(-t5 * t - c * t5)

    t_max = math.pow(_SPREAD_EXPONENT, 1.0 / 6.0)
    if c > 0.0:
        t_max = min(t_max, math.pow(_SPREAD_EXPONENT / c, 0.2))
    return min(1.0, _simpson(integrand, 0.0, t_max, _SPREAD_INTERVALS))
