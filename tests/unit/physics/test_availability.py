"""A link's UTC day by hour (``keystrata_physics.availability``).

Outside references, each named beside its check:

- the day's expected bits recomputed independently, hour by hour, from ``link.at`` at the
  half hour, the station's table and an expansion of the on-station windows;
- a Monte Carlo of the two-state Markov ("telegraph") cloud process built from its
  definition (exponential cloud spells of mean b, clear spells of mean b p / (1 - p),
  seeded numpy), sampled at the half hours as the model does: its mean and standard
  deviation over many days against ``expected_bits`` and ``sd_bits``. This checks the
  autocovariance p (1 - p) exp(-|t| / tau), tau = 1 / (1/b + 1/c), that the module cites
  from memory (Gardiner, Handbook of Stochastic Methods);
- the closed form of the double sum for a constant rate, sum_ij rho^|i-j| = n + 2
  sum_k (n - k) rho^k (a geometric series);
- the Sun at the half hours with PyEphem (PyPI); the span with ``geometry``;
- ``link.at``, the reference of the first check, against the law of cosines and PyEphem.
"""

from __future__ import annotations

import math
from datetime import UTC, date, datetime, timedelta

import ephem
import numpy as np
import pytest

from keystrata_physics import availability, geometry, link
from keystrata_physics.geometry import EARTH_RADIUS_M
from keystrata_physics.optics import LinkOptics, Platform, Protocol, StationSky

#: A narrow filter keeps key by day too, so the hourly rates differ between day and night
#: and none of them is zero (the checks below would pass on a flat or empty day).
OPTICS = LinkOptics(filter_nm=0.01, fov_urad=50.0)
PLATFORM = Platform(45.05, 7.05, 20_000.0, station_keeping_radius_m=3_000.0)
DAY = date(2026, 3, 20)


def station(clear_sky: object = 1.0, spell_s: float = 3600.0) -> StationSky:
    return StationSky(45.0, 7.0, 250.0, clear_sky=clear_sky, mean_cloud_spell_s=spell_s)


def test_expected_bits_is_the_sum_over_hours_computed_independently() -> None:
    """expected = sum_h rate_h x p_clear(month, h) x on_station(h + 0.5) x 3600, with the
    rate from ``link.at`` at the half hour, p from the station's 12 x 24 table (each cell
    distinct) and on-station from the windows (22, 5) and (11, 12.5) written out."""
    table = [[0.2 + 0.6 * ((7 * m + h) % 24) / 23.0 for h in range(24)] for m in range(12)]
    platform = Platform(45.05, 7.05, 20_000.0, on_station_hours=((22, 5), (11, 12.5)))
    sky = station(table)
    on_hours = {22, 23, 0, 1, 2, 3, 4, 11}  # 12:30 is outside [11, 12.5)
    day = availability.day_profile(OPTICS, platform, sky, DAY)

    midnight = datetime(DAY.year, DAY.month, DAY.day, tzinfo=UTC)
    expected = clear = 0.0
    assert [h.utc_hour for h in day.hours] == list(range(24))
    for h, hour in enumerate(day.hours):
        rate = link.at(OPTICS, platform, sky, midnight + timedelta(minutes=60 * h + 30))
        assert hour.secret_key_rate_bps == rate.secret_key_rate_bps > 0.0
        assert hour.clear_probability == table[DAY.month - 1][h]
        assert hour.on_station is (h in on_hours)
        weight = table[DAY.month - 1][h] if h in on_hours else 0.0
        assert hour.expected_rate_bps == pytest.approx(rate.secret_key_rate_bps * weight)
        expected += rate.secret_key_rate_bps * weight * 3600.0
        clear += rate.secret_key_rate_bps * 3600.0 if h in on_hours else 0.0
    assert day.expected_bits == pytest.approx(expected, rel=1e-12)
    assert day.clear_sky_bits == pytest.approx(clear, rel=1e-12)
    assert day.day == DAY


def test_a_clear_sky_has_no_spread_and_a_closed_one_no_key() -> None:
    clear = availability.day_profile(OPTICS, PLATFORM, station(1.0), DAY)
    assert clear.sd_bits == 0.0
    assert clear.expected_bits == pytest.approx(clear.clear_sky_bits, rel=1e-12)
    assert clear.expected_bits > 0.0
    closed = availability.day_profile(OPTICS, PLATFORM, station(0.0), DAY)
    assert closed.expected_bits == 0.0 and closed.sd_bits == 0.0
    assert closed.clear_sky_bits == clear.clear_sky_bits


def test_hours_off_station_make_nothing() -> None:
    platform = Platform(45.05, 7.05, 20_000.0, on_station_hours=((2, 5),))
    day = availability.day_profile(OPTICS, platform, station(0.7), DAY)
    on = [h.utc_hour for h in day.hours if h.on_station]
    assert on == [2, 3, 4]
    for hour in day.hours:
        if hour.utc_hour in on:
            assert hour.expected_rate_bps == pytest.approx(0.7 * hour.secret_key_rate_bps)
        else:
            # the clear-sky rate is still reported, the expected rate is zero
            assert hour.secret_key_rate_bps > 0.0 and hour.expected_rate_bps == 0.0
    assert day.clear_sky_bits == pytest.approx(
        3600.0 * sum(day.hours[h].secret_key_rate_bps for h in on), rel=1e-12
    )


# ---------------------------------------------------------------- the clouds' spread


def _telegraph_days(
    p: float, cloud_mean_s: float, days: int, rng: np.random.Generator
) -> np.ndarray:
    """Clear (1) or cloudy (0) at the 24 half hours of ``days`` simulated days.

    The process from its definition: cloud spells exponential of mean b, clear spells
    exponential of mean c = b p / (1 - p), alternating. Each day starts in the stationary
    state (clear with probability c / (b + c) = p) and, the durations being memoryless,
    the spell under way at midnight has the full exponential law of its state.
    """
    clear_mean_s = cloud_mean_s * p / (1.0 - p)
    spells = 64
    starts_clear = rng.random(days) < p
    k = np.arange(spells)
    clear_now = starts_clear[:, None] ^ (k[None, :] % 2 == 1)
    means = np.where(clear_now, clear_mean_s, cloud_mean_s)
    ends = np.cumsum(rng.exponential(1.0, (days, spells)) * means, axis=1)
    assert (ends[:, -1] > 86_400.0).all()  # enough spells to cover every day
    times = (np.arange(24) + 0.5) * 3600.0
    # the spell holding time t is the number of spells that ended by t
    index = (ends[:, :, None] <= times[None, None, :]).sum(axis=1)
    clear: np.ndarray = (starts_clear[:, None] ^ (index % 2 == 1)).astype(float)
    return clear


def _spread(bits_per_hour: np.ndarray, p: float, tau_s: float) -> float:
    lags = np.abs(np.subtract.outer(np.arange(24), np.arange(24))) * 3600.0
    cov = p * (1.0 - p) * (np.exp(-lags / tau_s) if tau_s > 0 else (lags == 0).astype(float))
    return float(math.sqrt(bits_per_hour @ cov @ bits_per_hour))


@pytest.mark.parametrize(("p", "spell_h"), [(0.6, 3.0), (0.3, 4.0), (0.85, 6.0)])
def test_spread_matches_a_monte_carlo_of_the_telegraph_process(p: float, spell_h: float) -> None:
    sky = station([p] * 12, spell_h * 3600.0)
    platform = Platform(45.05, 7.05, 20_000.0, on_station_hours=((0, 9), (15, 24)))
    # a wider filter than OPTICS: daylight about halves the rate
    day = availability.day_profile(LinkOptics(filter_nm=0.5, fov_urad=50.0), platform, sky, DAY)
    bits_per_hour = np.array(
        [h.secret_key_rate_bps * 3600.0 if h.on_station else 0.0 for h in day.hours]
    )
    # unequal weights: hours off station, and day hours well below night hours
    assert (bits_per_hour == 0).sum() == 6
    assert 0.0 < bits_per_hour[bits_per_hour > 0].min() < 0.8 * bits_per_hour.max()

    days = 20_000
    clear = _telegraph_days(p, spell_h * 3600.0, days, np.random.default_rng(7_2026))
    bits = clear @ bits_per_hour
    mean, sd = float(bits.mean()), float(bits.std(ddof=1))
    # standard error of the sample standard deviation from the fourth central moment
    m4 = float(((bits - mean) ** 4).mean())
    sd_error = math.sqrt((m4 - sd**4) / days) / (2.0 * sd)
    assert abs(mean - day.expected_bits) < 4.0 * sd / math.sqrt(days)
    assert mean == pytest.approx(day.expected_bits, rel=0.02)
    assert abs(sd - day.sd_bits) < 4.0 * sd_error
    assert sd == pytest.approx(day.sd_bits, rel=0.03)

    # The check can tell: correlation time b (the cloud spell) or none at all gives a
    # spread the simulation rejects.
    for wrong_tau in (spell_h * 3600.0, 0.0):
        assert abs(_spread(bits_per_hour, p, wrong_tau) - sd) > 6.0 * sd_error


def test_spread_of_a_constant_rate_has_the_geometric_closed_form() -> None:
    """A CV link sees no sky light, so its rate is the same at every hour: with s bits an
    hour, Var = s^2 p q [n + 2 sum_{k=1}^{n-1} (n - k) rho^k], rho = exp(-1 h / tau),
    tau = 1 / (1/b + 1/c) = b p for c = b p / (1 - p)."""
    optics = LinkOptics(protocol=Protocol.CV_GG02)
    p, b = 0.55, 5400.0
    day = availability.day_profile(optics, PLATFORM, station(p, b), DAY)
    rates = {h.secret_key_rate_bps for h in day.hours}
    assert len(rates) == 1 and all(h.qber is None for h in day.hours)
    s = rates.pop() * 3600.0
    tau = 1.0 / (1.0 / b + 1.0 / (b * p / (1.0 - p)))
    assert tau == pytest.approx(b * p)
    rho, n = math.exp(-3600.0 / tau), 24
    pairs = n + 2.0 * sum((n - k) * rho**k for k in range(1, n))
    assert day.sd_bits == pytest.approx(s * math.sqrt(p * (1 - p) * pairs), rel=1e-12)
    assert day.expected_bits == pytest.approx(24 * s * p, rel=1e-12)


def test_without_spells_the_hours_are_independent() -> None:
    """mean_cloud_spell_s = 0: no correlation between hours, Var = sum_h s_h^2 p q."""
    day = availability.day_profile(OPTICS, PLATFORM, station(0.4, 0.0), DAY)
    variance = sum((h.secret_key_rate_bps * 3600.0) ** 2 * 0.4 * 0.6 for h in day.hours)
    assert day.sd_bits == pytest.approx(math.sqrt(variance), rel=1e-12)


# ---------------------------------------------------------------- the day's figures


def test_the_point_is_the_best_hour() -> None:
    day = availability.day_profile(OPTICS, PLATFORM, station(0.5), DAY)
    rates = [h.secret_key_rate_bps for h in day.hours]
    best = rates.index(max(rates))
    assert min(rates) < max(rates)
    assert day.point.secret_key_rate_bps == max(rates)
    assert day.point.sun_elevation_deg == day.hours[best].sun_elevation_deg
    assert day.point.budget is not None
    assert day.point.secret_key_rate_bps < day.point.plob_bound_bps


def test_hours_take_the_sun_at_the_half_hour() -> None:
    """PyEphem (no refraction: pressure 0) at hh:30 UTC, within 0.02 degree."""
    day = availability.day_profile(OPTICS, PLATFORM, station(), DAY)
    observer = ephem.Observer()
    observer.lat, observer.lon, observer.pressure = "45.0", "7.0", 0.0
    for hour in (0, 6, 11, 17):
        observer.date = f"2026/03/20 {hour:02d}:30:00"
        expected = math.degrees(float(ephem.Sun(observer).alt))
        assert day.hours[hour].sun_elevation_deg == pytest.approx(expected, abs=0.02)


def test_span_delegates_to_geometry() -> None:
    sky = station()
    span = availability.span(PLATFORM, sky)
    expected = geometry.station_keeping_span(
        geometry.Site(45.0, 7.0, 250.0), geometry.Site(45.05, 7.05, 20_000.0), 3_000.0
    )
    assert span == expected
    centre = geometry.look(geometry.Site(45.0, 7.0, 250.0), geometry.Site(45.05, 7.05, 20_000.0))
    assert span.min_range_m < centre.slant_range_m < span.max_range_m
    assert span.min_elevation_deg < centre.elevation_deg < span.max_elevation_deg


# ---------------------------------------------------------------- link.at, the reference above


def test_at_uses_the_look_of_the_platform_and_the_sun_of_the_station() -> None:
    """Range and elevation from the law of cosines in the triangle Earth centre, station,
    platform (central angle by the haversine formula); the Sun from PyEphem (geocentric
    at the station's coordinates, no refraction: pressure 0) within 0.02 degree."""
    station = StationSky(50.0, 10.0, height_m=200.0)
    platform = Platform(50.15, 10.2, altitude_m=21_000.0)
    when = datetime(2026, 6, 21, 14, 30, tzinfo=UTC)
    point = link.at(LinkOptics(), platform, station, when)

    p1, p2 = math.radians(50.0), math.radians(50.15)
    dl = math.radians(0.2)
    hav = math.sin((p2 - p1) / 2) ** 2 + math.cos(p1) * math.cos(p2) * math.sin(dl / 2) ** 2
    gamma = 2.0 * math.asin(math.sqrt(hav))
    r0, r1 = EARTH_RADIUS_M + 200.0, EARTH_RADIUS_M + 21_000.0
    slant = math.sqrt(r0 * r0 + r1 * r1 - 2.0 * r0 * r1 * math.cos(gamma))
    elevation = math.degrees(math.asin((r1 * math.cos(gamma) - r0) / slant))
    assert point.slant_range_m == pytest.approx(slant, rel=1e-9)
    assert point.elevation_deg == pytest.approx(elevation, abs=1e-7)

    observer = ephem.Observer()
    observer.lat, observer.lon = "50.0", "10.0"
    observer.pressure = 0.0
    observer.date = when.strftime("%Y/%m/%d %H:%M:%S")
    sun = ephem.Sun(observer)
    assert point.sun_elevation_deg == pytest.approx(math.degrees(float(sun.alt)), abs=0.02)
    # a June afternoon in central Europe: daylight, background at the day radiance
    assert point.background_per_gate == pytest.approx(
        link.sky_counts(LinkOptics(), station, 60.0), rel=1e-12
    )
