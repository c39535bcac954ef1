"""A link's day: key rate by UTC hour, clouds and the platform's schedule.

For each hour the link is evaluated at the half hour (sun position, background, rate on a
clear sky, platform at the centre of its circle) and weighted by the chance that it
flies: ``expected = rate x P(clear line of sight) x on_station``. The day's expected
bits are the sum over the hours of 3,600 s times that.

The spread comes from the clouds. Cloud cover is taken as a two-state Markov
("telegraph") process whose clear share is the climatology's probability p and whose
cloud spells last ``mean_cloud_spell_s`` on average b; its clear spells then last
c = b p / (1 - p). The autocovariance of such a process is p (1 - p) exp(-|t| / tau) with
tau = 1 / (1/b + 1/c) (textbook result for a stationary two-state Markov chain, e.g.
Gardiner, Handbook of Stochastic Methods, from memory), so the variance of the day's bits
is the double sum over hours of r_i r_j 3600^2 sqrt(p_i q_i p_j q_j) exp(-|t_i - t_j| / tau),
with q = 1 - p and tau taken at the mean p. Hours are sampled at their middle, so the
variance within an hour is not resolved: a first model, good for sizing, not for
guarantees.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta

from keystrata_physics import geometry, link, sun
from keystrata_physics.optics import LinkOptics, Platform, StationSky

__all__ = ["Day", "Hour", "day_profile", "span"]

SECONDS_PER_HOUR = 3600.0


@dataclass(frozen=True, slots=True)
class Hour:
    """One UTC hour of a link's day.

    Attributes:
        utc_hour: 0-23; figures are taken at the half hour.
        sun_elevation_deg: the sun over the station.
        on_station: whether the platform is on station.
        clear_probability: chance of a clear line of sight.
        qber: QBER on a clear sky (BB84; ``None`` for CV or without key).
        secret_key_rate_bps: rate on a clear sky with the platform on station.
        expected_rate_bps: the rate weighted by clouds and schedule.
    """

    utc_hour: int
    sun_elevation_deg: float
    on_station: bool
    clear_probability: float
    qber: float | None
    secret_key_rate_bps: float
    expected_rate_bps: float


@dataclass(frozen=True, slots=True)
class Day:
    """A link's planned day.

    Attributes:
        day: the UTC date.
        point: the link at the half hour of its best clear-sky rate (the single figures of
            the per-link table: range, losses, QBER, rate, bound).
        hours: 24 :class:`Hour` records.
        expected_bits: expected secret bits over the day.
        sd_bits: standard deviation of the day's bits from the clouds (see module doc).
        clear_sky_bits: bits if every hour on station were clear.
    """

    day: date
    point: link.LinkPoint
    hours: tuple[Hour, ...]
    expected_bits: float
    sd_bits: float
    clear_sky_bits: float


def _tau_s(mean_p: float, mean_cloud_spell_s: float) -> float:
    """Correlation time of the cloud process (0 when it never or always clouds)."""
    if mean_cloud_spell_s <= 0 or mean_p <= 0 or mean_p >= 1:
        return 0.0
    clear_spell = mean_cloud_spell_s * mean_p / (1.0 - mean_p)
    return 1.0 / (1.0 / mean_cloud_spell_s + 1.0 / clear_spell)


def _spread(hours: tuple[Hour, ...], tau_s: float) -> float:
    variance = 0.0
    for a in hours:
        sa = a.secret_key_rate_bps * SECONDS_PER_HOUR if a.on_station else 0.0
        va = a.clear_probability * (1.0 - a.clear_probability)
        if sa == 0.0 or va == 0.0:
            continue
        for b in hours:
            sb = b.secret_key_rate_bps * SECONDS_PER_HOUR if b.on_station else 0.0
            vb = b.clear_probability * (1.0 - b.clear_probability)
            if sb == 0.0 or vb == 0.0:
                continue
            lag = abs(a.utc_hour - b.utc_hour) * SECONDS_PER_HOUR
            corr = 1.0 if lag == 0 else (math.exp(-lag / tau_s) if tau_s > 0 else 0.0)
            variance += sa * sb * math.sqrt(va * vb) * corr
    return math.sqrt(variance)


def day_profile(optics: LinkOptics, platform: Platform, sky: StationSky, day: date) -> Day:
    """Plan one UTC day of the link ``optics`` between ``platform`` and ``sky``."""
    look = geometry.look(link.station_site(sky), link.platform_site(platform))
    midnight = datetime(day.year, day.month, day.day, tzinfo=UTC)
    hours: list[Hour] = []
    points: list[link.LinkPoint] = []
    for h in range(24):
        when = midnight + timedelta(hours=h + 0.5)
        solar = sun.sun_position(when, sky.latitude_deg, sky.longitude_deg)
        point = link.evaluate(
            optics,
            look,
            sky=sky,
            sun_elevation_deg=solar.elevation_deg,
            platform_altitude_m=platform.altitude_m,
        )
        on = platform.on_station(h + 0.5)
        p_clear = sky.clear_probability(day.month, h)
        rate = point.secret_key_rate_bps
        hours.append(
            Hour(
                utc_hour=h,
                sun_elevation_deg=solar.elevation_deg,
                on_station=on,
                clear_probability=p_clear,
                qber=point.qber,
                secret_key_rate_bps=rate,
                expected_rate_bps=rate * p_clear if on else 0.0,
            )
        )
        points.append(point)
    best = max(range(24), key=lambda i: (points[i].secret_key_rate_bps, -i))
    frozen = tuple(hours)
    mean_p = sum(h.clear_probability for h in frozen) / 24.0
    return Day(
        day=day,
        point=points[best],
        hours=frozen,
        expected_bits=sum(h.expected_rate_bps for h in frozen) * SECONDS_PER_HOUR,
        sd_bits=_spread(frozen, _tau_s(mean_p, sky.mean_cloud_spell_s)),
        clear_sky_bits=sum(h.secret_key_rate_bps for h in frozen if h.on_station)
        * SECONDS_PER_HOUR,
    )


def span(platform: Platform, sky: StationSky) -> geometry.LookSpan:
    """Slant range and elevation over the platform's station-keeping circle."""
    return geometry.station_keeping_span(
        link.station_site(sky), link.platform_site(platform), platform.station_keeping_radius_m
    )
