"""The link emulator's fixed-rate model (``keystrata_client.emulators.model``) and the
weather chain both modes share, without I/O (physical mode:
``test_link_emulator_physical.py``).

The model is ours and its daylight curve is a modelling assumption (see the module's
docstring); these tests check that the code does what that docstring says. The one
outside fact used is the stationary distribution of a two-state continuous-time Markov
chain with mean holding times ``a`` (clear) and ``b`` (cloud): in the long run the chain
is clear a fraction ``a / (a + b)`` of the time (a common textbook result).
"""

from __future__ import annotations

import itertools
import math
import random
from datetime import UTC, datetime

import pytest

from keystrata_client.emulators.model import (
    LinkModel,
    ModelParams,
    TimeScale,
    Weather,
    WeatherChain,
    daylight_factor,
    draw_qber,
    solar_hour,
    stationary_clear_fraction,
)

HOUR = 3600.0
DAY = 24 * HOUR
#: 2026-06-21T00:00:00Z, a UTC midnight.
MIDNIGHT = datetime(2026, 6, 21, tzinfo=UTC).timestamp()


def clear_sky(**overrides: float) -> ModelParams:
    values = {"base_rate_bps": 20_000.0, "day_factor": 0.1, "mean_cloud_s": 0.0}
    values.update(overrides)
    return ModelParams(**values)


def samples(model: LinkModel, count: int = 500, step: float = 97.0) -> list[tuple[object, ...]]:
    return [
        (s.weather, s.rate_bps, s.daylight, s.weather_until)
        for s in (model.state_at(model.start + i * step) for i in range(count))
    ]


# -- determinism -------------------------------------------------------------------------


def test_same_seed_and_start_give_the_same_link() -> None:
    params = ModelParams(base_rate_bps=5000.0, mean_clear_s=2 * HOUR, mean_cloud_s=HOUR)
    a = LinkModel(params, seed=42, start=MIDNIGHT)
    b = LinkModel(params, seed=42, start=MIDNIGHT)
    assert samples(a) == samples(b)


def test_answers_do_not_depend_on_the_order_of_questions() -> None:
    params = ModelParams(base_rate_bps=5000.0, mean_clear_s=HOUR, mean_cloud_s=HOUR)
    forward = LinkModel(params, seed=9, start=MIDNIGHT)
    backward = LinkModel(params, seed=9, start=MIDNIGHT)
    times = [MIDNIGHT + i * 611.0 for i in range(300)]
    assert [forward.rate_at(t) for t in times] == [backward.rate_at(t) for t in reversed(times)][
        ::-1
    ]


def test_different_seeds_give_different_weather() -> None:
    params = ModelParams(base_rate_bps=5000.0, mean_clear_s=HOUR, mean_cloud_s=HOUR)
    weathers = {
        tuple(
            LinkModel(params, seed=s, start=MIDNIGHT).weather_at(MIDNIGHT + i * 900.0)
            for i in range(200)
        )
        for s in range(5)
    }
    assert len(weathers) == 5


def test_times_before_the_start_are_refused() -> None:
    model = LinkModel(clear_sky(), seed=1, start=MIDNIGHT)
    with pytest.raises(ValueError, match="before"):
        model.rate_at(MIDNIGHT - 1.0)


# -- weather -----------------------------------------------------------------------------


def test_rate_is_zero_in_cloud_and_positive_when_clear() -> None:
    params = ModelParams(base_rate_bps=8000.0, mean_clear_s=HOUR, mean_cloud_s=HOUR)
    model = LinkModel(params, seed=3, start=MIDNIGHT)
    seen = set()
    for i in range(2000):
        t = MIDNIGHT + i * 173.0
        state = model.state_at(t)
        seen.add(state.weather)
        if state.weather is Weather.CLOUD:
            assert state.rate_bps == 0.0 and model.rate_at(t) == 0.0
        else:
            assert state.rate_bps > 0.0
    assert seen == {Weather.CLEAR, Weather.CLOUD}


def test_weather_holds_until_weather_until_then_changes() -> None:
    params = ModelParams(base_rate_bps=1.0, mean_clear_s=HOUR, mean_cloud_s=HOUR / 2)
    model = LinkModel(params, seed=11, start=MIDNIGHT)
    t = MIDNIGHT
    for _ in range(50):
        state = model.state_at(t)
        assert state.weather_until > t
        assert model.weather_at(state.weather_until - 1e-6) is state.weather
        assert model.weather_at(state.weather_until) is not state.weather
        t = state.weather_until


def test_no_clouds_when_mean_cloud_is_zero() -> None:
    model = LinkModel(clear_sky(), seed=5, start=MIDNIGHT)
    assert model.weather_time(MIDNIGHT, MIDNIGHT + 30 * DAY) == {
        Weather.CLEAR: 30 * DAY,
        Weather.CLOUD: 0.0,
    }
    assert math.isinf(model.state_at(MIDNIGHT).weather_until)


@pytest.mark.parametrize(
    ("mean_clear", "mean_cloud"), [(6 * HOUR, 2 * HOUR), (HOUR, HOUR), (30 * 60.0, 4 * HOUR)]
)
def test_long_run_clear_fraction_is_the_stationary_distribution(
    mean_clear: float, mean_cloud: float
) -> None:
    # Two-state continuous-time Markov chain: stationary P(clear) = a / (a + b), a
    # textbook result. About 10 000 clear/cloud cycles: the standard error of the
    # sample fraction is below 0.003 for these parameters; the tolerance is 0.01.
    params = ModelParams(base_rate_bps=1.0, mean_clear_s=mean_clear, mean_cloud_s=mean_cloud)
    span = 10_000 * (mean_clear + mean_cloud)
    for seed in (1, 2, 3):
        model = LinkModel(params, seed=seed, start=0.0)
        totals = model.weather_time(0.0, span)
        assert totals[Weather.CLEAR] + totals[Weather.CLOUD] == pytest.approx(span)
        fraction = totals[Weather.CLEAR] / span
        assert fraction == pytest.approx(
            stationary_clear_fraction(mean_clear, mean_cloud), abs=0.01
        )


def test_mean_spell_lengths_match_the_parameters() -> None:
    params = ModelParams(base_rate_bps=1.0, mean_clear_s=5 * HOUR, mean_cloud_s=HOUR)
    model = LinkModel(params, seed=8, start=0.0)
    spells: dict[Weather, list[float]] = {Weather.CLEAR: [], Weather.CLOUD: []}
    t = model.state_at(0.0).weather_until  # skip the first, cut short by the start
    for _ in range(8000):
        state = model.state_at(t)
        spells[state.weather].append(state.weather_until - t)
        t = state.weather_until
    assert sum(spells[Weather.CLEAR]) / len(spells[Weather.CLEAR]) == pytest.approx(
        5 * HOUR, rel=0.05
    )
    assert sum(spells[Weather.CLOUD]) / len(spells[Weather.CLOUD]) == pytest.approx(HOUR, rel=0.05)


def test_a_spell_that_does_not_happen_lets_the_state_before_it_go_on() -> None:
    # Clear spells of 0 s before 10 000 s (a clear chance of 0, as physical mode gives
    # them), 100 s after; cloud spells of 1 000 s.
    def spell(state: Weather, begin: float) -> float:
        if state is Weather.CLOUD:
            return 1000.0
        return 0.0 if begin < 10_000.0 else 100.0

    chain = WeatherChain(0.0, Weather.CLOUD, spell)
    assert chain.at(500.0) == (Weather.CLOUD, 10_000.0)
    assert chain.time_in(0.0, 10_000.0) == {Weather.CLEAR: 0.0, Weather.CLOUD: 10_000.0}
    assert chain.at(10_050.0) == (Weather.CLEAR, 10_100.0)
    assert chain.at(10_100.0) == (Weather.CLOUD, 11_100.0)


def test_state_reports_the_planned_figures_in_fixed_rate_mode() -> None:
    params = ModelParams(base_rate_bps=8000.0, mean_clear_s=HOUR, mean_cloud_s=HOUR)
    model = LinkModel(params, seed=3, start=MIDNIGHT)
    seen = set()
    for i in range(500):
        state = model.state_at(MIDNIGHT + i * 173.0)
        seen.add(state.weather)
        assert state.planned_rate_bps == pytest.approx(8000.0 * state.daylight)
        assert state.rate_bps == (state.planned_rate_bps if state.weather is Weather.CLEAR else 0)
        assert (state.planned_qber, state.sun_elevation_deg, state.on_station) == (
            0.02,
            None,
            True,
        )
    assert seen == {Weather.CLEAR, Weather.CLOUD}


# -- daylight ----------------------------------------------------------------------------


def test_full_rate_at_night_and_day_factor_at_noon() -> None:
    model = LinkModel(clear_sky(day_factor=0.1), seed=1, start=MIDNIGHT)
    assert model.rate_at(MIDNIGHT) == pytest.approx(20_000.0, rel=1e-4)
    assert model.rate_at(MIDNIGHT + 12 * HOUR) == pytest.approx(2_000.0, rel=1e-4)
    # Halfway at 06:00 and 18:00 local solar time, by the curve's construction.
    assert model.rate_at(MIDNIGHT + 6 * HOUR) == pytest.approx(11_000.0, rel=1e-9)
    assert model.rate_at(MIDNIGHT + 18 * HOUR) == pytest.approx(11_000.0, rel=1e-9)


@pytest.mark.parametrize("day_factor", [0.0, 0.05, 0.1, 0.5, 1.0])
def test_day_factor_scales_the_day_rate(day_factor: float) -> None:
    model = LinkModel(clear_sky(day_factor=day_factor), seed=1, start=MIDNIGHT)
    noon = model.state_at(MIDNIGHT + 12 * HOUR)
    assert noon.daylight == pytest.approx(day_factor, abs=1e-5)
    assert noon.rate_bps == pytest.approx(20_000.0 * noon.daylight)


def test_rate_falls_steadily_from_midnight_to_noon_and_is_periodic() -> None:
    model = LinkModel(clear_sky(), seed=1, start=MIDNIGHT)
    morning = [model.rate_at(MIDNIGHT + m * 60.0) for m in range(0, 12 * 60 + 1, 10)]
    assert all(a >= b for a, b in itertools.pairwise(morning))
    for hour in range(24):
        t = MIDNIGHT + hour * HOUR
        assert model.rate_at(t) == pytest.approx(model.rate_at(t + 3 * DAY), rel=1e-9)


def test_longitude_moves_local_noon() -> None:
    east = LinkModel(clear_sky(longitude_deg=90.0), seed=1, start=MIDNIGHT)
    # 90 degrees east: local solar noon at 06:00 UTC, local midnight at 18:00 UTC.
    assert solar_hour(MIDNIGHT + 6 * HOUR, 90.0) == pytest.approx(12.0)
    assert east.daylight_at(MIDNIGHT + 6 * HOUR) == pytest.approx(0.1, abs=1e-5)
    assert east.daylight_at(MIDNIGHT + 18 * HOUR) == pytest.approx(1.0, abs=1e-5)


def test_twilight_takes_about_two_hours_by_default() -> None:
    assert daylight_factor(5.0, 0.1) > 0.95
    assert daylight_factor(7.0, 0.1) < 0.15


# -- parameters, QBER, time scale --------------------------------------------------------


@pytest.mark.parametrize(
    "bad",
    [
        {"base_rate_bps": -1.0},
        {"day_factor": 1.5},
        {"twilight": 0.0},
        {"mean_clear_s": 0.0},
        {"mean_cloud_s": -5.0},
        {"qber_mean": 0.7},
        {"base_rate_bps": math.nan},
    ],
)
def test_out_of_range_parameters_are_refused(bad: dict[str, float]) -> None:
    values = {"base_rate_bps": 1.0, **bad}
    with pytest.raises(ValueError, match=next(iter(bad))):
        ModelParams(**values)


def test_qber_draws_centre_on_the_mean_and_stay_in_range() -> None:
    rng = random.Random(4)
    draws = [draw_qber(rng, 0.02, 0.004) for _ in range(20_000)]
    assert sum(draws) / len(draws) == pytest.approx(0.02, abs=2e-4)
    assert all(0.0 <= q <= 0.5 for q in draws)
    wide = [draw_qber(rng, 0.1, 0.5) for _ in range(1000)]
    assert min(wide) == 0.0 and max(wide) == 0.5  # clipped at both ends


def test_time_scale_maps_a_real_minute_to_an_emulated_hour() -> None:
    scale = TimeScale(start=MIDNIGHT, factor=60.0)
    assert scale.emulated(0.0) == MIDNIGHT
    assert scale.emulated(60.0) == MIDNIGHT + HOUR
    with pytest.raises(ValueError, match="time_scale"):
        TimeScale(start=0.0, factor=0.0)
