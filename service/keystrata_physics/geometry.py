"""Where a platform is seen from a ground station: slant range, elevation and azimuth.

Spherical Earth of radius ``EARTH_RADIUS_M`` = 6,371 km throughout (not WGS84): heights
are above that sphere, latitudes are geocentric, and "up" at a site is the radial
direction. Against WGS84 this moves elevations by up to about 0.2 degrees (the angle
between the geodetic and geocentric verticals) and ranges by well under 1 % for a
platform at stratospheric height, which is below what the rest of a link budget knows.

Angles in the API are degrees (names end in ``_deg``), distances metres.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from keystrata_physics.checks import number as _finite

EARTH_RADIUS_M = 6_371_000.0
"""Mean Earth radius of the spherical model, metres."""

#: The lowest height a site may have: below the lowest dry land (about -430 m).
_MIN_HEIGHT_M = -500.0


def _height(name: str, value: float) -> float:
    height = _finite(name, value)
    if height <= _MIN_HEIGHT_M:
        raise ValueError(f"{name} must be > {_MIN_HEIGHT_M:g} m, got {value!r}")
    return height


@dataclass(frozen=True, slots=True)
class Site:
    """A place on or above the spherical Earth.

    ``latitude_deg`` in [-90, 90] (north positive), ``longitude_deg`` in [-180, 180]
    (east positive), ``height_m`` above the sphere of radius ``EARTH_RADIUS_M``
    (finite, > -500 m). Raises ValueError naming the field otherwise.
    """

    latitude_deg: float
    longitude_deg: float
    height_m: float = 0.0

    def __post_init__(self) -> None:
        lat = _finite("latitude_deg", self.latitude_deg)
        lon = _finite("longitude_deg", self.longitude_deg)
        if not -90.0 <= lat <= 90.0:
            raise ValueError(f"latitude_deg must be in [-90, 90], got {lat!r}")
        if not -180.0 <= lon <= 180.0:
            raise ValueError(f"longitude_deg must be in [-180, 180], got {lon!r}")
        _height("height_m", self.height_m)


def slant_range_m(
    elevation_deg: float, station_height_m: float, platform_altitude_m: float
) -> float:
    """Line-of-sight distance from a station to a platform seen at ``elevation_deg``.

    With r0 = R + station height and r1 = R + platform altitude (spherical Earth, R =
    ``EARTH_RADIUS_M``), L = sqrt(r1^2 - r0^2 cos^2 e) - r0 sin e (the law of cosines in
    the triangle Earth centre, station, platform). It is evaluated in the equivalent form
    (r1^2 - r0^2) / (sqrt(r1^2 - r0^2 cos^2 e) + r0 sin e), which does not lose digits
    to cancellation near the zenith. Refraction is not included.

    Returns metres. Raises ValueError when the elevation is outside [0, 90] degrees
    (below the horizon or past the zenith), a height is not finite or <= -500 m, or the
    platform is not above the station.
    """
    elevation = _finite("elevation_deg", elevation_deg)
    if elevation < 0.0:
        raise ValueError(f"elevation_deg must be in [0, 90], got {elevation!r}: below the horizon")
    if elevation > 90.0:
        raise ValueError(f"elevation_deg must be in [0, 90], got {elevation!r}")
    h0 = _height("station_height_m", station_height_m)
    h1 = _height("platform_altitude_m", platform_altitude_m)
    if h1 <= h0:
        raise ValueError(
            f"platform_altitude_m must be above station_height_m ({h0!r} m), got {h1!r}"
        )
    r0 = EARTH_RADIUS_M + h0
    r1 = EARTH_RADIUS_M + h1
    e = math.radians(elevation)
    cos_e = math.cos(e)
    return (h1 - h0) * (r1 + r0) / (math.sqrt(r1 * r1 - (r0 * cos_e) ** 2) + r0 * math.sin(e))


def ecef_m(site: Site) -> tuple[float, float, float]:
    """Earth-centred Cartesian position (x, y, z) of ``site`` on the spherical Earth, metres.

    x towards latitude 0, longitude 0; z towards the north pole; radius R + height.
    """
    lat = math.radians(site.latitude_deg)
    lon = math.radians(site.longitude_deg)
    r = EARTH_RADIUS_M + site.height_m
    return (
        r * math.cos(lat) * math.cos(lon),
        r * math.cos(lat) * math.sin(lon),
        r * math.sin(lat),
    )


@dataclass(frozen=True, slots=True)
class Look:
    """How a platform is seen from a station: line-of-sight distance (metres), elevation
    above the local horizontal plane (degrees, negative below it) and azimuth (degrees in
    [0, 360), clockwise from north)."""

    slant_range_m: float
    elevation_deg: float
    azimuth_deg: float


def look(station: Site, platform: Site) -> Look:
    """Range, elevation and azimuth of ``platform`` seen from ``station``.

    Both positions go to Earth-centred vectors (``ecef_m``); with d = platform - station
    and the station's local unit vectors up (radial), east and north, elevation =
    asin(d . up / |d|) (evaluated as an atan2) and azimuth = atan2(d . east, d . north),
    clockwise from north.
    Spherical Earth, no refraction. The elevation is negative when the platform is below
    the station's horizontal plane; the azimuth of a platform straight overhead is 0.

    Raises ValueError when the two positions coincide.
    """
    sx, sy, sz = ecef_m(station)
    px, py, pz = ecef_m(platform)
    dx, dy, dz = px - sx, py - sy, pz - sz
    distance = math.sqrt(dx * dx + dy * dy + dz * dz)
    if distance == 0.0:
        raise ValueError("platform must not be at the station's position")
    lat = math.radians(station.latitude_deg)
    lon = math.radians(station.longitude_deg)
    sin_lat, cos_lat = math.sin(lat), math.cos(lat)
    sin_lon, cos_lon = math.sin(lon), math.cos(lon)
    up = dx * cos_lat * cos_lon + dy * cos_lat * sin_lon + dz * sin_lat
    east = -dx * sin_lon + dy * cos_lon
    north = -dx * sin_lat * cos_lon - dy * sin_lat * sin_lon + dz * cos_lat
    # atan2 of the vertical over the horizontal part is asin(d . up / |d|) without the
    # loss of digits asin has next to the zenith.
    elevation = math.degrees(math.atan2(up, math.hypot(east, north)))
    azimuth = math.degrees(math.atan2(east, north)) % 360.0
    return Look(slant_range_m=distance, elevation_deg=elevation, azimuth_deg=azimuth)


@dataclass(frozen=True, slots=True)
class LookSpan:
    """The extremes of range (metres) and elevation (degrees) over a set of positions."""

    min_range_m: float
    max_range_m: float
    min_elevation_deg: float
    max_elevation_deg: float


def _destination(centre: Site, bearing_rad: float, angle_rad: float) -> Site:
    """The site at angular distance ``angle_rad`` from ``centre`` along the great circle
    leaving it at ``bearing_rad`` (clockwise from north), at the centre's height."""
    lat1 = math.radians(centre.latitude_deg)
    lon1 = math.radians(centre.longitude_deg)
    sin_lat2 = math.sin(lat1) * math.cos(angle_rad) + math.cos(lat1) * math.sin(
        angle_rad
    ) * math.cos(bearing_rad)
    lat2 = math.asin(max(-1.0, min(1.0, sin_lat2)))
    lon2 = lon1 + math.atan2(
        math.sin(bearing_rad) * math.sin(angle_rad) * math.cos(lat1),
        math.cos(angle_rad) - math.sin(lat1) * sin_lat2,
    )
    longitude = (math.degrees(lon2) + 540.0) % 360.0 - 180.0
    return Site(math.degrees(lat2), max(-180.0, min(180.0, longitude)), centre.height_m)


def _bearing_rad(origin: Site, target: Site) -> float:
    """Initial great-circle bearing from ``origin`` to ``target``, clockwise from north."""
    lat1 = math.radians(origin.latitude_deg)
    lat2 = math.radians(target.latitude_deg)
    dlon = math.radians(target.longitude_deg - origin.longitude_deg)
    return math.atan2(
        math.sin(dlon) * math.cos(lat2),
        math.cos(lat1) * math.sin(lat2) - math.sin(lat1) * math.cos(lat2) * math.cos(dlon),
    )


def station_keeping_span(
    station: Site, platform_centre: Site, radius_m: float, samples: int = 72
) -> LookSpan:
    """Range and elevation extremes for a platform anywhere on its station-keeping circle.

    The circle is the set of points at great-circle distance ``radius_m`` (measured on the
    sphere of radius ``EARTH_RADIUS_M``, i.e. along the ground) from the centre's
    sub-platform point, all at the centre's height; ``radius_m`` = 0 is the centre alone.

    On a spherical Earth both range and elevation depend only on the angle at the Earth's
    centre between station and platform, monotonically, so the extremes lie at the two
    points of the circle on the great circle through the station and the centre: those
    two are always evaluated, which makes the answer exact. ``samples`` further points,
    evenly spaced around the circle, are evaluated as well (they cannot widen the span on
    the sphere; they keep it honest if the model of the Earth changes).

    Raises ValueError when ``radius_m`` is negative, not finite or not less than half the
    Earth's circumference, when ``samples`` is not an integer >= 1, or when the platform
    would coincide with the station (``look``).
    """
    radius = _finite("radius_m", radius_m)
    if radius < 0.0 or radius >= math.pi * EARTH_RADIUS_M:
        raise ValueError(
            f"radius_m must be in [0, {math.pi * EARTH_RADIUS_M:.0f}) m, got {radius_m!r}"
        )
    if isinstance(samples, bool) or not isinstance(samples, int) or samples < 1:
        raise ValueError(f"samples must be an integer >= 1, got {samples!r}")
    if radius == 0.0:
        positions = [platform_centre]
    else:
        angle = radius / EARTH_RADIUS_M
        towards = _bearing_rad(platform_centre, station)
        bearings = [towards, towards + math.pi]
        bearings += [2.0 * math.pi * i / samples for i in range(samples)]
        positions = [_destination(platform_centre, b, angle) for b in bearings]
    looks = [look(station, p) for p in positions]
    return LookSpan(
        min_range_m=min(v.slant_range_m for v in looks),
        max_range_m=max(v.slant_range_m for v in looks),
        min_elevation_deg=min(v.elevation_deg for v in looks),
        max_elevation_deg=max(v.elevation_deg for v in looks),
    )
