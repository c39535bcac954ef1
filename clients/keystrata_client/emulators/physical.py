"""Physical mode of the link emulator: rate and QBER from the link model.

A link given its optical profile (a ``keystrata_physics`` :class:`LinkOptics`, the
relay's :class:`Platform` and the station's :class:`StationSky`) is emulated with the
same model the operator's plan uses, so every number it makes is physically consistent:

- **The link at time t** is ``keystrata_physics.link.at(optics, platform, station,
  t in UTC)``: the sun's position over the station from the emulated date and time, the
  sky's background light, the link budget along the look from the station to the
  platform at the centre of its circle, and the key rate of decoy-state BB84 or GG02
  CV-QKD. That costs tens of microseconds, so it is evaluated once per emulated minute
  and link, at the start of the minute (:data:`MINUTE`); within a minute the rate is
  held. The planned (clear-sky) rate and QBER are these figures.
- **The platform's schedule**: no key while it is off station
  (``Platform.on_station`` at the UTC hour, checked at the exact time).
- **Clouds**: no key under cloud. Cloud cover is the two-state Markov process
  ``keystrata_physics.availability`` assumes for the plan: cloud spells last
  ``station.mean_cloud_spell_s`` (b) on average, clear spells b p / (1 - p) with p =
  ``station.clear_probability(month, hour)`` at the time the clear spell begins, so in a
  stretch of constant p the long-run clear share is p. An hour of p = 0 is always cloud
  and an hour of p = 1 always clear, as the plan counts them: no clear spell begins at
  p = 0 and one ends where an hour of p = 0 begins; no cloud spell begins at p = 1 and
  one ends where an hour of p = 1 begins; a clear spell begun at p = 1 lasts until the
  next hour whose p is below 1 (for ever if there is none), then as drawn with that
  hour's p. Elsewhere a spell begun under one hour's p runs on into the next hours, so
  where the table changes from hour to hour the emulated clear share follows it about
  one spell late. The chain starts clear with probability p at the start.

QBER of the blocks: the model's (clipped to [0, 0.5]), plus a normal noise of sd
``qber_sd`` only when that is given (default 0). While the model makes no key, no block
is made. A CV link has no bit error rate in the model (its errors are the frame errors
of reconciliation, which the model does not compute): its blocks carry a QBER of 0.0,
which says "not measured" rather than "no errors", and its ``planned_qber`` is ``None``.

Rates are secret bits per real second, as in fixed-rate mode: ``time_scale`` speeds the
sky, not the detectors.
"""

from __future__ import annotations

import math
import random
from dataclasses import dataclass
from datetime import UTC, datetime

from keystrata_client.emulators.model import (
    LinkModel,
    LinkState,
    ModelParams,
    RateModel,
    Weather,
    WeatherChain,
    solar_hour,
)
from keystrata_physics import geometry, link
from keystrata_physics.optics import LinkOptics, Platform, StationSky

__all__ = ["MINUTE", "PhysicalLinkModel", "PhysicalProfile", "rate_model"]

#: The model is evaluated once per this many emulated seconds (at the start of each).
MINUTE = 60.0
SECONDS_PER_HOUR = 3600.0
#: Evaluations kept per link; older ones are dropped together (the emulator asks in
#: time order, so it only ever needs the latest).
_CACHE_MINUTES = 4096
#: Far enough to look for an hour whose clear chance is below 1: a leap year of hours.
_HOURS_AHEAD = 366 * 24


@dataclass(frozen=True, slots=True)
class PhysicalProfile:
    """One link's optical profile: what physical mode needs.

    Attributes:
        optics: the link's transmitter, receiver and protocol.
        platform: where the relay flies and when it is on station.
        station: where the station stands, its sky and its clouds.
        qber_sd: standard deviation of a normal noise on the model's QBER (0: none).

    Raises:
        ValueError: ``qber_sd`` out of range; clouds that cannot be emulated (a clear
            chance below 1 somewhere with ``station.mean_cloud_spell_s`` = 0); a
            platform too low over the station for the link model to fly the link; or a
            profile the link model refuses. Messages name the field where there is one.
    """

    optics: LinkOptics
    platform: Platform
    station: StationSky
    qber_sd: float = 0.0

    def __post_init__(self) -> None:
        sd = self.qber_sd
        if isinstance(sd, bool) or not isinstance(sd, int | float) or not math.isfinite(sd):
            raise ValueError(f"qber_sd must be a number >= 0, got {sd!r}")
        if sd < 0:
            raise ValueError(f"qber_sd must be a number >= 0, got {sd!r}")
        clouds = min(min(row) for row in self.station.clear_sky) < 1.0
        if clouds and self.station.mean_cloud_spell_s <= 0:
            raise ValueError(
                "station.mean_cloud_spell_s must be > 0 to emulate clouds "
                "(station.clear_sky is below 1 somewhere)"
            )
        look = geometry.look(link.station_site(self.station), link.platform_site(self.platform))
        if look.elevation_deg < link.MIN_ELEVATION_DEG:
            raise ValueError(
                f"the platform stands {look.elevation_deg:.2f} deg above the station's "
                f"horizon, below the {link.MIN_ELEVATION_DEG} deg the link model flies: "
                "the link would never make key (check the platform's and the station's "
                "latitude_deg, longitude_deg, altitude_m)"
            )
        try:
            link.at(self.optics, self.platform, self.station, datetime(2000, 1, 1, tzinfo=UTC))
        except ValueError as exc:
            raise ValueError(
                f"the link model refuses this profile: {_station_names(exc)}"
            ) from None


def _station_names(exc: ValueError) -> str:
    """The background module names the sky radiances its own way; say them as fields."""
    text = str(exc)
    for inner, field in (
        ("night_w_m2_sr_nm", "station.night_radiance"),
        ("day_w_m2_sr_nm", "station.day_radiance"),
    ):
        text = text.replace(inner, field)
    return text


def _utc(t: float) -> datetime:
    return datetime.fromtimestamp(t, UTC)


class PhysicalLinkModel:
    """The physical-mode model of one link (see the module docstring), deterministic
    given ``profile``, ``seed`` and ``start``.

    Args:
        profile: the link's optical profile.
        seed: seed of the cloud chain.
        start: emulated POSIX second at which the chain starts.
    """

    def __init__(self, profile: PhysicalProfile, *, seed: int, start: float) -> None:
        self.profile = profile
        self.seed = seed
        # Clouds are for the emulation, not for keys: a seeded PRNG is what we want.
        self._rng = random.Random(seed)  # noqa: S311
        self._points: dict[int, link.LinkPoint] = {}
        station = profile.station
        chances = {p for row in station.clear_sky for p in row}
        self._always_clear = chances == {1.0}
        self._never_clear = chances == {0.0}
        self._some_zero = 0.0 in chances
        self._some_one = 1.0 in chances
        look = geometry.look(link.station_site(station), link.platform_site(profile.platform))
        night = link.evaluate(
            profile.optics,
            look,
            sky=station,
            sun_elevation_deg=-90.0,
            platform_altitude_m=profile.platform.altitude_m,
        )
        self.night_rate_bps = night.secret_key_rate_bps
        first = Weather.CLEAR if self._rng.random() < self.clear_chance(start) else Weather.CLOUD
        self._chain = WeatherChain(start, first, self._spell)

    @property
    def start(self) -> float:
        return self._chain.start

    # -- clouds ----------------------------------------------------------------------------

    def clear_chance(self, t: float) -> float:
        """The station's chance of a clear line of sight in the month and UTC hour of ``t``."""
        when = _utc(t)
        return self.profile.station.clear_probability(when.month, when.hour)

    def _first_hour(self, begin: float, end: float, chance: float | None) -> float:
        """The first whole UTC hour after ``begin`` and before ``end`` whose clear chance
        is ``chance`` (``None``: below 1), else ``end``."""
        hour = math.floor(begin / SECONDS_PER_HOUR) + 1
        while (boundary := hour * SECONDS_PER_HOUR) < end:
            p = self.clear_chance(boundary)
            if p == chance or (chance is None and p < 1.0):
                return boundary
            hour += 1
        return end

    def _spell(self, state: Weather, begin: float) -> float:
        mean_cloud = self.profile.station.mean_cloud_spell_s
        if state is Weather.CLOUD:
            if self._never_clear:
                return math.inf
            if self._some_one and self.clear_chance(begin) >= 1.0:
                return 0.0
            end = begin + self._rng.expovariate(1.0 / mean_cloud)
            return (self._first_hour(begin, end, 1.0) if self._some_one else end) - begin
        p = self.clear_chance(begin)
        if p <= 0.0:
            return 0.0
        if p >= 1.0:
            if self._always_clear:
                return math.inf
            horizon = begin + _HOURS_AHEAD * SECONDS_PER_HOUR
            until = self._first_hour(begin, horizon, None)
            return until - begin + self._spell(state, until) if until < horizon else math.inf
        end = begin + self._rng.expovariate((1.0 - p) / (mean_cloud * p))
        return (self._first_hour(begin, end, 0.0) if self._some_zero else end) - begin

    def weather_at(self, t: float) -> Weather:
        """Return the weather at ``t``.

        Raises:
            ValueError: ``t`` is before ``start``.
        """
        return self._chain.at(t)[0]

    def weather_time(self, t0: float, t1: float) -> dict[Weather, float]:
        """Return how many seconds of ``[t0, t1)`` are clear and how many cloudy.

        Raises:
            ValueError: ``t0`` is before ``start`` or ``t1`` < ``t0``.
        """
        return self._chain.time_in(t0, t1)

    # -- the link ---------------------------------------------------------------------------

    def point_at(self, t: float) -> link.LinkPoint:
        """The link model's figures for the emulated minute holding ``t`` (clear sky,
        platform on station), evaluated at the start of that minute."""
        minute = math.floor(t / MINUTE)
        point = self._points.get(minute)
        if point is None:
            if len(self._points) >= _CACHE_MINUTES:
                self._points.clear()
            p = self.profile
            point = link.at(p.optics, p.platform, p.station, _utc(minute * MINUTE))
            self._points[minute] = point
        return point

    def on_station(self, t: float) -> bool:
        """Whether the platform is on station at ``t``."""
        return self.profile.platform.on_station((t % 86_400.0) / SECONDS_PER_HOUR)

    def state_at(self, t: float) -> LinkState:
        """Return the full :class:`LinkState` at ``t``.

        Raises:
            ValueError: ``t`` is before ``start``.
        """
        weather, until = self._chain.at(t)
        point = self.point_at(t)
        on = self.on_station(t)
        planned = point.secret_key_rate_bps
        night = self.night_rate_bps
        qber = None if point.qber is None else min(0.5, max(0.0, point.qber))
        return LinkState(
            t=t,
            solar_hour=solar_hour(t, self.profile.station.longitude_deg),
            daylight=min(1.0, planned / night) if night > 0 else 1.0,
            weather=weather,
            rate_bps=planned if on and weather is Weather.CLEAR else 0.0,
            weather_until=until,
            planned_rate_bps=planned,
            planned_qber=qber,
            sun_elevation_deg=point.sun_elevation_deg,
            on_station=on,
        )

    def rate_at(self, t: float) -> float:
        """Return the secret key rate in bits per second at ``t``.

        Raises:
            ValueError: ``t`` is before ``start``.
        """
        return self.state_at(t).rate_bps


def rate_model(params: ModelParams | PhysicalProfile, *, seed: int, start: float) -> RateModel:
    """Return the rate model of a link: fixed-rate for :class:`ModelParams`, physical for
    a :class:`PhysicalProfile`."""
    if isinstance(params, PhysicalProfile):
        return PhysicalLinkModel(params, seed=seed, start=start)
    return LinkModel(params, seed=seed, start=start)
