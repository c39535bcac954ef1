"""Where the Sun is in a station's sky, for the background light of a link.

Meeus, *Astronomical Algorithms*, 2nd ed. (Willmann-Bell, 1998): chapter 7 (Julian day),
chapter 12 (sidereal time at Greenwich), chapter 13 (horizontal coordinates) and the
low-accuracy method of chapter 25 (solar coordinates, about 0.01 degree). The time is
taken as dynamical time as well as UT: Delta T (about a minute in this century) moves
the Sun by less than 0.001 degree. The position is geocentric (the Sun's parallax is
under 0.003 degree) and without refraction, which would lift the Sun near the horizon
by up to about half a degree.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import UTC, datetime

from keystrata_physics.checks import number as _finite

#: Julian day of the epoch J2000.0 (2000 January 1.5 TD).
J2000 = 2451545.0


def _aware(when: datetime) -> datetime:
    if not isinstance(when, datetime):
        raise ValueError(f"when must be a datetime, got {when!r}")
    if when.tzinfo is None or when.utcoffset() is None:
        raise ValueError(f"when must be timezone-aware, got {when.isoformat()}")
    return when.astimezone(UTC)


def julian_day_from_calendar(year: int, month: int, day: float) -> float:
    """Julian day of a Gregorian calendar date, the day with its fraction (Meeus ch. 7).

    With Y, M the year and month (January and February counted as months 13 and 14 of
    the year before), A = int(Y / 100), B = 2 - A + int(A / 4):
    JD = int(365.25 (Y + 4716)) + int(30.6001 (M + 1)) + D + B - 1524.5.
    Gregorian calendar throughout (proleptic before 1582, as Python's ``datetime``), years
    1 to 9999 (``datetime``'s), where Meeus's INT and ``math.floor`` agree.

    Raises ValueError when the year is not in 1..9999, the month not in 1..12, or the
    day not in [1, 32).
    """
    if isinstance(year, bool) or not isinstance(year, int) or not 1 <= year <= 9999:
        raise ValueError(f"year must be an integer in 1..9999, got {year!r}")
    if isinstance(month, bool) or not isinstance(month, int) or not 1 <= month <= 12:
        raise ValueError(f"month must be an integer in 1..12, got {month!r}")
    d = _finite("day", day)
    if not 1.0 <= d < 32.0:
        raise ValueError(f"day must be in [1, 32), got {day!r}")
    y, m = (year - 1, month + 12) if month <= 2 else (year, month)
    a = math.floor(y / 100)
    b = 2 - a + math.floor(a / 4)
    return math.floor(365.25 * (y + 4716)) + math.floor(30.6001 * (m + 1)) + d + b - 1524.5


def julian_day(when: datetime) -> float:
    """Julian day of the timezone-aware ``when`` (converted to UTC first; Meeus ch. 7).

    Raises ValueError when ``when`` is naive.
    """
    utc = _aware(when)
    seconds = utc.hour * 3600 + utc.minute * 60 + utc.second + utc.microsecond / 1e6
    return julian_day_from_calendar(utc.year, utc.month, utc.day + seconds / 86400.0)


def greenwich_mean_sidereal_deg(jd: float) -> float:
    """Mean sidereal time at Greenwich in degrees [0, 360) at Julian day ``jd`` (UT).

    Meeus eq. (12.4): theta0 = 280.46061837 + 360.98564736629 (JD - 2451545.0)
    + 0.000387933 T^2 - T^3 / 38710000, T in Julian centuries from J2000.0.

    Raises ValueError when ``jd`` is not finite.
    """
    days = _finite("jd", jd) - J2000
    t = days / 36525.0
    theta = 280.46061837 + 360.98564736629 * days + 0.000387933 * t * t - t**3 / 38710000.0
    return theta % 360.0


def solar_coordinates_deg(jd: float) -> tuple[float, float]:
    """The Sun's apparent right ascension and declination in degrees at ``jd`` (TD).

    Meeus ch. 25, low accuracy: T in Julian centuries from J2000.0; mean longitude
    L0 = 280.46646 + 36000.76983 T + 0.0003032 T^2; mean anomaly
    M = 357.52911 + 35999.05029 T - 0.0001537 T^2; equation of the centre
    C = (1.914602 - 0.004817 T - 0.000014 T^2) sin M + (0.019993 - 0.000101 T) sin 2M
    + 0.000289 sin 3M; apparent longitude lambda = L0 + C - 0.00569 - 0.00478 sin(Omega),
    Omega = 125.04 - 1934.136 T; obliquity (eq. 22.2 and 25.8)
    eps = 23 deg 26' 21.448" - 46.8150" T - 0.00059" T^2 + 0.001813" T^3 + 0.00256 cos(Omega);
    then tan(alpha) = cos(eps) sin(lambda) / cos(lambda), sin(delta) = sin(eps) sin(lambda).
    Right ascension in [0, 360).

    Raises ValueError when ``jd`` is not finite.
    """
    t = (_finite("jd", jd) - J2000) / 36525.0
    l0 = 280.46646 + 36000.76983 * t + 0.0003032 * t * t
    m = math.radians(357.52911 + 35999.05029 * t - 0.0001537 * t * t)
    c = (
        (1.914602 - 0.004817 * t - 0.000014 * t * t) * math.sin(m)
        + (0.019993 - 0.000101 * t) * math.sin(2 * m)
        + 0.000289 * math.sin(3 * m)
    )
    omega = math.radians(125.04 - 1934.136 * t)
    apparent = math.radians(l0 + c - 0.00569 - 0.00478 * math.sin(omega))
    eps0_arcsec = 21.448 - 46.8150 * t - 0.00059 * t * t + 0.001813 * t**3
    eps = math.radians(23.0 + 26.0 / 60.0 + eps0_arcsec / 3600.0 + 0.00256 * math.cos(omega))
    alpha = math.atan2(math.cos(eps) * math.sin(apparent), math.cos(apparent))
    delta = math.asin(math.sin(eps) * math.sin(apparent))
    return math.degrees(alpha) % 360.0, math.degrees(delta)


@dataclass(frozen=True, slots=True)
class SunPosition:
    """The Sun seen from a site: elevation above the horizon (degrees, negative below,
    no refraction), azimuth (degrees in [0, 360), clockwise from north), and its apparent
    geocentric right ascension and declination (degrees)."""

    elevation_deg: float
    azimuth_deg: float
    right_ascension_deg: float
    declination_deg: float


def sun_position(when: datetime, latitude_deg: float, longitude_deg: float) -> SunPosition:
    """The Sun's position at ``when`` (timezone-aware) from a site (east longitude positive).

    Right ascension alpha and declination delta from ``solar_coordinates_deg``; hour
    angle H = theta0 + longitude - alpha with the Greenwich sidereal time theta0
    (``greenwich_mean_sidereal_deg``); then (Meeus ch. 13, azimuth turned to count from
    north) sin(h) = sin(phi) sin(delta) + cos(phi) cos(delta) cos(H) and
    azimuth = atan2(-cos(delta) sin(H), sin(delta) cos(phi) - cos(delta) cos(H) sin(phi)).
    Geocentric, no refraction (see the module docstring); at a pole the azimuth follows
    the given longitude's meridian as north.

    Raises ValueError when ``when`` is naive, the latitude is not in [-90, 90] or the
    longitude not in [-180, 180].
    """
    jd = julian_day(when)
    lat = _finite("latitude_deg", latitude_deg)
    lon = _finite("longitude_deg", longitude_deg)
    if not -90.0 <= lat <= 90.0:
        raise ValueError(f"latitude_deg must be in [-90, 90], got {latitude_deg!r}")
    if not -180.0 <= lon <= 180.0:
        raise ValueError(f"longitude_deg must be in [-180, 180], got {longitude_deg!r}")
    alpha, delta = solar_coordinates_deg(jd)
    hour_angle = math.radians(greenwich_mean_sidereal_deg(jd) + lon - alpha)
    phi = math.radians(lat)
    dec = math.radians(delta)
    sin_h = math.sin(phi) * math.sin(dec) + math.cos(phi) * math.cos(dec) * math.cos(hour_angle)
    elevation = math.degrees(math.asin(max(-1.0, min(1.0, sin_h))))
    azimuth = math.atan2(
        -math.cos(dec) * math.sin(hour_angle),
        math.sin(dec) * math.cos(phi) - math.cos(dec) * math.cos(hour_angle) * math.sin(phi),
    )
    return SunPosition(
        elevation_deg=elevation,
        azimuth_deg=math.degrees(azimuth) % 360.0,
        right_ascension_deg=alpha,
        declination_deg=delta,
    )
