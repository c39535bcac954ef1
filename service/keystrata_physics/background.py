"""Sky light that reaches the detectors of a receiver looking at the platform.

The sky's spectral radiance at the receiver's wavelength is an input, by day and by
night, because it depends on the site, the haze and the direction of the Sun. As orders
of magnitude only (from memory): a clear daytime sky near 800 nm is about 1e-2 to 1e-1
W m^-2 sr^-1 nm^-1, a moonless night sky many orders lower (around 1e-8 to 1e-9), a
full-Moon night in between. Between the two the radiance is interpolated through
twilight by the Sun's elevation.
"""

from __future__ import annotations

import math

from keystrata_physics.checks import number as _number
from keystrata_physics.checks import positive as _positive

#: Planck constant (J s) and speed of light (m/s): exact in the SI since 2019.
PLANCK_J_S = 6.62607015e-34
LIGHT_SPEED_M_S = 299_792_458.0


def sky_radiance(
    sun_elevation_deg: float,
    *,
    day_w_m2_sr_nm: float,
    night_w_m2_sr_nm: float,
    twilight_low_deg: float = -12.0,
    twilight_high_deg: float = 6.0,
) -> float:
    """Sky spectral radiance (W m^-2 sr^-1 nm^-1) with the Sun at ``sun_elevation_deg``.

    The night value with the Sun at or below ``twilight_low_deg`` (default -12 degrees,
    the end of nautical twilight), the day value at or above ``twilight_high_deg``
    (default 6 degrees), and in between a straight line in log(radiance) against the
    Sun's elevation: the sky brightens by roughly a constant factor per degree through
    twilight (a modelling assumption; common practice). See the module docstring for
    orders of magnitude of the two values.

    Raises ValueError when the elevation is not in [-90, 90], a radiance is not finite
    and > 0, the night value exceeds the day value, or the twilight edges are not in
    [-90, 90] with the low edge below the high one.
    """
    elevation = _number("sun_elevation_deg", sun_elevation_deg)
    if not -90.0 <= elevation <= 90.0:
        raise ValueError(f"sun_elevation_deg must be in [-90, 90], got {sun_elevation_deg!r}")
    day = _positive("day_w_m2_sr_nm", day_w_m2_sr_nm)
    night = _positive("night_w_m2_sr_nm", night_w_m2_sr_nm)
    if night > day:
        raise ValueError(
            f"night_w_m2_sr_nm must not exceed day_w_m2_sr_nm ({day!r}), got {night_w_m2_sr_nm!r}"
        )
    low = _number("twilight_low_deg", twilight_low_deg)
    high = _number("twilight_high_deg", twilight_high_deg)
    if not -90.0 <= low <= 90.0:
        raise ValueError(f"twilight_low_deg must be in [-90, 90], got {twilight_low_deg!r}")
    if not low < high <= 90.0:
        raise ValueError(
            f"twilight_high_deg must be above twilight_low_deg ({low!r}) and <= 90, "
            f"got {twilight_high_deg!r}"
        )
    if elevation <= low:
        return night
    if elevation >= high:
        return day
    share = (elevation - low) / (high - low)
    return math.exp(math.log(night) + share * (math.log(day) - math.log(night)))


def cone_solid_angle_sr(fov_full_angle_rad: float) -> float:
    """Solid angle 2 pi (1 - cos(alpha / 2)) of a circular cone of full angle alpha.

    Computed as 4 pi sin^2(alpha / 4), the same value without cancellation for the
    microradian fields of view of a link receiver. Raises ValueError unless the angle is
    in (0, 2 pi].
    """
    angle = _positive("fov_full_angle_rad", fov_full_angle_rad)
    if angle > 2.0 * math.pi:
        raise ValueError(f"fov_full_angle_rad must be <= 2 pi, got {fov_full_angle_rad!r}")
    return 4.0 * math.pi * math.sin(angle / 4.0) ** 2


def background_counts_per_gate(
    radiance_w_m2_sr_nm: float,
    *,
    fov_full_angle_rad: float,
    aperture_diameter_m: float,
    filter_width_nm: float,
    gate_s: float,
    receiver_efficiency: float,
    wavelength_m: float,
) -> float:
    """Mean number of sky photo-detections in one detection gate.

    N = H Omega A d_lambda t eta / (h c / lambda): the radiance H collected over the
    field of view's solid angle Omega (a circular cone, ``cone_solid_angle_sr``), the
    aperture area A = pi D^2 / 4, the filter's width d_lambda in nm and the gate time t,
    times the receiver's efficiency eta (optics, filter peak and detector together),
    divided by the photon energy. Omega A is the étendue for a field of view of a few
    degrees or less (a wide cone would take the projected solid angle pi sin^2(alpha/2)
    instead). The sky is taken as uniform over the field of view, which is filled.

    Raises ValueError when the radiance is negative or not finite, the field of view is
    not in (0, 2 pi], the efficiency not in (0, 1], or any other input not finite and > 0.
    """
    radiance = _number("radiance_w_m2_sr_nm", radiance_w_m2_sr_nm)
    if radiance < 0.0:
        raise ValueError(f"radiance_w_m2_sr_nm must be >= 0, got {radiance_w_m2_sr_nm!r}")
    solid_angle = cone_solid_angle_sr(fov_full_angle_rad)
    diameter = _positive("aperture_diameter_m", aperture_diameter_m)
    width = _positive("filter_width_nm", filter_width_nm)
    gate = _positive("gate_s", gate_s)
    efficiency = _positive("receiver_efficiency", receiver_efficiency)
    if efficiency > 1.0:
        raise ValueError(f"receiver_efficiency must be in (0, 1], got {receiver_efficiency!r}")
    wavelength = _positive("wavelength_m", wavelength_m)
    area = math.pi * diameter * diameter / 4.0
    photon_j = PLANCK_J_S * LIGHT_SPEED_M_S / wavelength
    return radiance * solid_angle * area * width * gate * efficiency / photon_j
