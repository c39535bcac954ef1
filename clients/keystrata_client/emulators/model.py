"""Rate model of an emulated free-space QKD link in fixed-rate mode: daylight and clouds.

The emulator has two modes (see ``config.py`` for the file format):

- **fixed-rate** (this module): a link's rate is ``base_rate_bps`` shaped by a daylight
  curve and clouds, and its QBER is drawn around ``qber_mean``. Tests and simple runs
  use it; nothing in it is physics.
- **physical** (``physical.py``): the link's optical profile goes through the link model
  of ``keystrata_physics``, so rate and QBER follow the sun, the geometry and the sky.

Both are pure: no I/O, no wall clock. Given the parameters, a seed and a start time,
every answer for a time ``t`` is fixed, whatever order the questions come in. Times are
emulated POSIX seconds (seconds since 1970-01-01T00:00:00Z on the emulated clock). Both
draw their clouds with :class:`WeatherChain` and answer with a :class:`LinkState`.

The fixed-rate model, in full::

    rate(t) = base_rate_bps * daylight(t) * weather(t)

Daylight (a modelling assumption, not a measurement): a free-space link loses most of
its secret key rate by day, because background light raises the error rate and the
filtering that fights it costs signal. We take a smooth curve of the local mean solar
hour ``h`` (UTC hour + longitude / 15; no season, no equation of time)::

    s(h)        = -cos(2 pi h / 24)            -1 at midnight, +1 at noon, 0 at 06 and 18
    w(h)        = (1 + tanh(s / twilight)) / 2  0 by night, 1 by day, 1/2 at 06 and 18
    daylight(h) = 1 - (1 - day_factor) * w(h)   1 by night, day_factor by day

With the default ``twilight`` = 0.15 the change from night to day takes about two hours.

Weather (also an assumption): clouds stop the link. A two-state continuous-time Markov
chain, ``clear`` <-> ``cloud``, stays in each state for an exponentially distributed
time with mean ``mean_clear_s`` or ``mean_cloud_s``; ``weather(t)`` is 1 when clear, 0
in cloud. Its stationary distribution gives the long-run fraction of clear time
``mean_clear_s / (mean_clear_s + mean_cloud_s)``; the chain starts in a state drawn
from that distribution, so it is stationary from the start.
"""

from __future__ import annotations

import bisect
import math
import random
from collections.abc import Callable
from dataclasses import dataclass
from enum import StrEnum
from typing import Protocol

SECONDS_PER_DAY = 86_400.0


class Weather(StrEnum):
    """State of the sky over a link."""

    CLEAR = "clear"
    CLOUD = "cloud"


SpellLength = Callable[[Weather, float], float]
"""``(state, begin)`` -> length in seconds of a spell of ``state`` that begins at
``begin``: ``inf`` for ever, 0 for a spell that does not happen."""


class WeatherChain:
    """Clear and cloud spells in turn from ``start``, drawn lazily as far as asked.

    ``spell`` gives each spell's length when it begins (it draws from its own seeded
    source, once per spell and in time order, so the chain is fixed by that source and
    ``start`` whatever order the questions come in). A spell of length 0 is skipped: the
    state before it goes on with a fresh spell, and the end reported for a spell is where
    the weather really changes. Memory grows with one float per change of weather.

    Args:
        start: emulated POSIX second at which the chain starts.
        first: the state at ``start``.
        spell: the spell lengths (see :data:`SpellLength`).
    """

    def __init__(self, start: float, first: Weather, spell: SpellLength) -> None:
        self.start = start
        self._spell = spell
        #: _changes[i] is when _states[i] begins; _states alternate.
        self._changes: list[float] = [start]
        self._states: list[Weather] = [first]
        self._horizon = start + spell(first, start)
        #: Length of the spell that begins at the horizon, once drawn.
        self._next: float | None = None

    def _settle(self) -> None:
        """Make the horizon the true end of the last spell: a spell of no length after it
        lets the last state go on with a fresh spell (a clear chance of 0 at its start)."""
        while math.isfinite(self._horizon):
            if self._next is None:
                following = Weather.CLOUD if self._states[-1] is Weather.CLEAR else Weather.CLEAR
                self._next = self._spell(following, self._horizon)
            if self._next > 0.0:
                return
            self._next = None
            self._horizon += self._spell(self._states[-1], self._horizon)

    def _extend(self, t: float) -> None:
        while True:
            self._settle()
            if self._horizon > t or self._next is None:
                return
            self._changes.append(self._horizon)
            self._states.append(
                Weather.CLOUD if self._states[-1] is Weather.CLEAR else Weather.CLEAR
            )
            self._horizon += self._next
            self._next = None

    def _index(self, t: float) -> int:
        if t < self.start:
            raise ValueError("the model starts at its start time; t lies before it")
        self._extend(t)
        return bisect.bisect_right(self._changes, t) - 1

    def at(self, t: float) -> tuple[Weather, float]:
        """Return the weather at ``t`` and when it ends (``inf``: never).

        Raises:
            ValueError: ``t`` is before ``start``.
        """
        i = self._index(t)
        until = self._changes[i + 1] if i + 1 < len(self._changes) else self._horizon
        return self._states[i], until

    def time_in(self, t0: float, t1: float) -> dict[Weather, float]:
        """Return how many seconds of ``[t0, t1)`` are clear and how many cloudy.

        Raises:
            ValueError: ``t0`` is before ``start`` or ``t1`` < ``t0``.
        """
        if t1 < t0:
            raise ValueError("t1 must not be before t0")
        i = self._index(t0)
        self._extend(t1)
        totals = {Weather.CLEAR: 0.0, Weather.CLOUD: 0.0}
        while i < len(self._states):
            begin = max(t0, self._changes[i])
            end = min(t1, self._changes[i + 1] if i + 1 < len(self._changes) else self._horizon)
            if begin >= t1:
                break
            totals[self._states[i]] += end - begin
            i += 1
        return totals


@dataclass(frozen=True, slots=True)
class ModelParams:
    """Parameters of one link's fixed-rate model.

    Attributes:
        base_rate_bps: secret key rate on a clear night, bits per second.
        day_factor: share of ``base_rate_bps`` left at full day, in [0, 1].
        twilight: width of the night/day transition (see module docstring), > 0.
        longitude_deg: east longitude of the link, degrees; sets the local solar hour.
        mean_clear_s: mean length of a clear spell, emulated seconds, > 0.
        mean_cloud_s: mean length of a cloud outage, emulated seconds; 0 = no clouds.
        qber_mean: mean QBER reported with blocks.
        qber_sd: standard deviation of the QBER around its mean.

    Raises:
        ValueError: a parameter outside its range (the message names it).
    """

    base_rate_bps: float
    day_factor: float = 0.1
    twilight: float = 0.15
    longitude_deg: float = 0.0
    mean_clear_s: float = 6 * 3600.0
    mean_cloud_s: float = 3600.0
    qber_mean: float = 0.02
    qber_sd: float = 0.004

    def __post_init__(self) -> None:
        checks = {
            "base_rate_bps": self.base_rate_bps >= 0,
            "day_factor": 0.0 <= self.day_factor <= 1.0,
            "twilight": self.twilight > 0,
            "longitude_deg": -180.0 <= self.longitude_deg <= 180.0,
            "mean_clear_s": self.mean_clear_s > 0,
            "mean_cloud_s": self.mean_cloud_s >= 0,
            "qber_mean": 0.0 <= self.qber_mean <= 0.5,
            "qber_sd": self.qber_sd >= 0,
        }
        for name, ok in checks.items():
            value = getattr(self, name)
            if not (ok and math.isfinite(value)):
                raise ValueError(f"model parameter {name} = {value!r} is out of range")


@dataclass(frozen=True, slots=True)
class LinkState:
    """A rate model's view of a link at time ``t``.

    Attributes:
        t: emulated POSIX seconds.
        solar_hour: local mean solar hour, [0, 24) (at the station in physical mode).
        daylight: share of the clear-night rate that daylight leaves, [0, 1]: fixed-rate
            mode, the daylight factor; physical mode, the planned rate over the planned
            rate under a night sky (1 for CV links, whose receivers filter the sky out).
        weather: clear or cloud.
        rate_bps: the secret key rate emulated now, bits per second (0 in cloud or off
            station).
        weather_until: when the current weather ends (emulated POSIX seconds; ``inf``
            when the sky never changes again).
        planned_rate_bps: the rate on a clear sky with the platform on station.
        planned_qber: the QBER on a clear sky, before the noise of ``qber_sd``: fixed-rate
            mode ``qber_mean``; physical mode the link model's, ``None`` for CV links and
            while the model makes no key.
        sun_elevation_deg: the sun over the station (physical mode; ``None`` otherwise).
        on_station: whether the platform is on station (always true in fixed-rate mode).
    """

    t: float
    solar_hour: float
    daylight: float
    weather: Weather
    rate_bps: float
    weather_until: float
    planned_rate_bps: float
    planned_qber: float | None
    sun_elevation_deg: float | None
    on_station: bool


class RateModel(Protocol):
    """What the emulator asks of a link's rate model, in either mode."""

    @property
    def start(self) -> float: ...

    def state_at(self, t: float) -> LinkState: ...

    def rate_at(self, t: float) -> float: ...

    def weather_at(self, t: float) -> Weather: ...

    def weather_time(self, t0: float, t1: float) -> dict[Weather, float]: ...


def solar_hour(t: float, longitude_deg: float = 0.0) -> float:
    """Return the local mean solar hour in [0, 24) at POSIX time ``t``."""
    return ((t / 3600.0) + longitude_deg / 15.0) % 24.0


def daylight_factor(hour: float, day_factor: float, twilight: float = 0.15) -> float:
    """Return the daylight factor for a local solar ``hour`` (see module docstring)."""
    s = -math.cos(2.0 * math.pi * hour / 24.0)
    w = 0.5 * (1.0 + math.tanh(s / twilight))
    return 1.0 - (1.0 - day_factor) * w


def stationary_clear_fraction(mean_clear_s: float, mean_cloud_s: float) -> float:
    """Return the long-run share of clear time, ``mean_clear / (mean_clear + mean_cloud)``."""
    return mean_clear_s / (mean_clear_s + mean_cloud_s)


def draw_qber(rng: random.Random, mean: float, sd: float) -> float:
    """Return a QBER drawn from a normal law around ``mean``, clipped to [0, 0.5]."""
    return min(0.5, max(0.0, rng.gauss(mean, sd)))


class LinkModel:
    """The fixed-rate model of one link, deterministic given ``params``, ``seed`` and
    ``start``.

    The weather chain is drawn lazily from ``random.Random(seed)`` as far as the latest
    time asked about, so memory grows with one float per weather change.

    Args:
        params: the link's parameters.
        seed: seed of the weather chain.
        start: emulated POSIX second at which the chain starts.
    """

    def __init__(self, params: ModelParams, *, seed: int, start: float) -> None:
        self.params = params
        self.seed = seed
        # Weather is for the emulation, not for keys: a seeded PRNG is what we want.
        self._rng = random.Random(seed)  # noqa: S311
        clouds = params.mean_cloud_s > 0
        p_clear = stationary_clear_fraction(params.mean_clear_s, params.mean_cloud_s)
        first = Weather.CLEAR if not clouds or self._rng.random() < p_clear else Weather.CLOUD
        self._chain = WeatherChain(start, first, self._holding)

    @property
    def start(self) -> float:
        return self._chain.start

    def _holding(self, state: Weather, begin: float) -> float:
        if self.params.mean_cloud_s <= 0:
            return math.inf
        mean = self.params.mean_clear_s if state is Weather.CLEAR else self.params.mean_cloud_s
        return self._rng.expovariate(1.0 / mean)

    def weather_at(self, t: float) -> Weather:
        """Return the weather at ``t``.

        Raises:
            ValueError: ``t`` is before ``start``.
        """
        return self._chain.at(t)[0]

    def daylight_at(self, t: float) -> float:
        """Return the daylight factor at ``t`` (defined for any ``t``)."""
        p = self.params
        return daylight_factor(solar_hour(t, p.longitude_deg), p.day_factor, p.twilight)

    def rate_at(self, t: float) -> float:
        """Return the secret key rate in bits per second at ``t``.

        Raises:
            ValueError: ``t`` is before ``start``.
        """
        if self.weather_at(t) is Weather.CLOUD:
            return 0.0
        return self.params.base_rate_bps * self.daylight_at(t)

    def state_at(self, t: float) -> LinkState:
        """Return the full :class:`LinkState` at ``t``.

        Raises:
            ValueError: ``t`` is before ``start``.
        """
        weather, until = self._chain.at(t)
        daylight = self.daylight_at(t)
        planned = self.params.base_rate_bps * daylight
        return LinkState(
            t=t,
            solar_hour=solar_hour(t, self.params.longitude_deg),
            daylight=daylight,
            weather=weather,
            rate_bps=0.0 if weather is Weather.CLOUD else planned,
            weather_until=until,
            planned_rate_bps=planned,
            planned_qber=self.params.qber_mean,
            sun_elevation_deg=None,
            on_station=True,
        )

    def weather_time(self, t0: float, t1: float) -> dict[Weather, float]:
        """Return how many seconds of ``[t0, t1)`` are clear and how many cloudy.

        Raises:
            ValueError: ``t0`` is before ``start`` or ``t1`` < ``t0``.
        """
        return self._chain.time_in(t0, t1)


@dataclass(frozen=True, slots=True)
class TimeScale:
    """Maps real elapsed seconds to the emulated clock.

    Attributes:
        start: emulated POSIX second at real elapsed time 0.
        factor: emulated seconds per real second (60 = one emulated hour a real minute).
    """

    start: float
    factor: float = 1.0

    def __post_init__(self) -> None:
        if not (math.isfinite(self.factor) and self.factor > 0):
            raise ValueError("time_scale must be a positive number")

    def emulated(self, elapsed_real: float) -> float:
        """Return the emulated POSIX time after ``elapsed_real`` real seconds."""
        return self.start + elapsed_real * self.factor
