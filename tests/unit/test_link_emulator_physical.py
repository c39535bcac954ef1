"""The link emulator in physical mode (``keystrata_client.emulators.physical``): the wiring
from a link's optical profile to the rate and QBER it emulates, without I/O.

The physics itself is tested in ``tests/unit/physics`` against its sources; here
``keystrata_physics.link.at`` is the reference the emulator must reproduce, and outside
references check what the emulator adds: the emulated time reaching the sun's position
(PyEphem; the solstice noon and midnight elevations 90 - phi +- delta), and the cloud
process (the stationary two-state Markov chain, and its variance over a window).
"""

from __future__ import annotations

import asyncio
import json
import math
import statistics
import tomllib
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import ephem  # type: ignore[import-untyped]
import httpx
import pytest
from click.testing import CliRunner

from keystrata_client import AsyncModuleClient, TlsIdentity
from keystrata_client.emulators import LinkEmulator, LinkSpec, LinkStats, Weather, links
from keystrata_client.emulators.config import ConfigError, load_config, parse_config
from keystrata_client.emulators.physical import MINUTE, PhysicalLinkModel, PhysicalProfile
from keystrata_physics import availability, link
from keystrata_physics.optics import LinkOptics, Platform, StationSky

HOUR = 3600.0
DAY = 24 * HOUR
#: The invented station Harrow Point at 58.05 N, 11.1 E, and a platform 6 km north-west
#: of it at 20 km: the link model's defaults otherwise.
STATION = {"latitude_deg": 58.05, "longitude_deg": 11.1}
PLATFORM = {"latitude_deg": 58.0, "longitude_deg": 11.0}
#: A receiver with a wide filter and a narrow field of view under a modest day sky: it
#: still makes key at noon, so the QBER by day can be compared with the QBER by night.
DAY_CAPABLE = {"filter_nm": 3.0, "fov_urad": 30.0}
MIDSUMMER = datetime(2026, 6, 21, tzinfo=UTC)


def profile(
    optics: dict[str, Any] | None = None,
    platform: dict[str, Any] | None = None,
    station: dict[str, Any] | None = None,
) -> PhysicalProfile:
    return PhysicalProfile(
        optics=LinkOptics(**{"clock_hz": 1e6, **(optics or {})}),
        platform=Platform(**{**PLATFORM, **(platform or {})}),
        station=StationSky(**{**STATION, **(station or {})}),
    )


def model(prof: PhysicalProfile, start: datetime = MIDSUMMER, seed: int = 1) -> PhysicalLinkModel:
    return PhysicalLinkModel(prof, seed=seed, start=start.timestamp())


def reference(prof: PhysicalProfile, when: datetime) -> link.LinkPoint:
    return link.at(prof.optics, prof.platform, prof.station, when)


# -- configuration --------------------------------------------------------------------


def link_table(**extra: Any) -> dict[str, Any]:
    table = {
        "link_id": "link-harrow",
        "relay_url": "http://127.0.0.1:8440",
        "station_url": "http://127.0.0.1:8441",
        "optics": {"clock_hz": 1e6},
        "platform": dict(PLATFORM),
        "station": dict(STATION),
    }
    table.update(extra)
    return {k: v for k, v in table.items() if v is not None}


def parse(table: dict[str, Any], defaults: dict[str, Any] | None = None) -> LinkSpec:
    data: dict[str, Any] = {"link": [table]}
    if defaults is not None:
        data["defaults"] = defaults
    return parse_config(data, Path(".")).links[0]


def test_three_tables_make_a_physical_link_with_the_fields_given(tmp_path: Path) -> None:
    text = """
[defaults.platform]
latitude_deg = 58.0
longitude_deg = 11.0
on_station_hours = [[20, 6]]

[[link]]
link_id = "link-harrow"
relay_url = "http://127.0.0.1:8440"
station_url = "http://127.0.0.1:8441"
qber_sd = 0.001
[link.optics]
protocol = "cv-gg02"
clock_hz = 5e7
detection = "heterodyne"
[link.platform]
altitude_m = 21000.0
[link.station]
latitude_deg = 58.05
longitude_deg = 11.1
clear_sky = [0.3, 0.3, 0.4, 0.5, 0.6, 0.7, 0.7, 0.6, 0.5, 0.4, 0.3, 0.3]
mean_cloud_spell_s = 5400.0
"""
    path = tmp_path / "links.toml"
    path.write_text(text)
    (spec,) = load_config(path).links
    prof = spec.model
    assert isinstance(prof, PhysicalProfile)
    assert (prof.optics.protocol.value, prof.optics.clock_hz) == ("cv-gg02", 5e7)
    assert prof.optics.detection == "heterodyne" and prof.optics.mu == LinkOptics().mu
    # [defaults.platform] and [link.platform] merge field by field.
    assert prof.platform.on_station_hours == ((20.0, 6.0),)
    assert prof.platform.altitude_m == 21000.0
    assert prof.station.clear_probability(7, 3) == 0.7 and prof.station.mean_cloud_spell_s == 5400
    assert prof.qber_sd == 0.001


def test_a_link_without_the_tables_stays_in_fixed_rate_mode() -> None:
    spec = parse(link_table(optics=None, platform=None, station=None, base_rate_bps=1e4))
    assert not isinstance(spec.model, PhysicalProfile)
    assert spec.model.base_rate_bps == 1e4


@pytest.mark.parametrize(
    ("table", "values", "named"),
    [
        ("optics", {"divergence_urad": -1.0}, "optics.divergence_urad"),
        ("optics", {"protocol": "bb92"}, "optics.protocol"),
        ("optics", {"colour": "red"}, "optics.colour"),
        ("optics", {"mu": 0.5, "nu": 0.6}, "optics.nu"),
        ("optics", {"detectors": 4.5}, "optics.detectors"),
        ("optics", {"turbulence": "yes"}, "optics.turbulence"),
        ("platform", {**PLATFORM, "latitude_deg": 95.0}, "platform.latitude_deg"),
        ("platform", {"longitude_deg": 11.0}, "platform.latitude_deg"),
        ("platform", {**PLATFORM, "on_station_hours": 5}, "platform.on_station_hours"),
        ("platform", {**PLATFORM, "on_station_hours": [[1, 30]]}, "platform.on_station_hours"),
        ("station", {**STATION, "clear_sky": [0.5, 0.5]}, "station.clear_sky"),
        ("station", {**STATION, "clear_sky": 1.5}, "station.clear_sky"),
        ("station", {**STATION, "mean_cloud_spell_s": -1.0}, "station.mean_cloud_spell_s"),
        ("station", {**STATION, "height_m": "high"}, "station.height_m"),
        # Accepted by StationSky, refused by the sky model: still named as the field.
        ("station", {**STATION, "night_radiance": 0.0}, "station.night_radiance"),
        ("station", {**STATION, "clear_sky": 0.5, "mean_cloud_spell_s": 0}, "mean_cloud_spell_s"),
        ("optics", 5, "optics: write it as a table"),
    ],
)
def test_bad_physical_values_are_config_errors_naming_the_field(
    table: str, values: Any, named: str
) -> None:
    with pytest.raises(ConfigError) as caught:
        parse(link_table(**{table: values}))
    assert named in str(caught.value)
    assert str(caught.value).startswith("link link-harrow: ")


def test_some_tables_but_not_all_is_an_error_naming_the_missing() -> None:
    with pytest.raises(ConfigError, match=r"needs all three .* station missing"):
        parse(link_table(station=None))
    with pytest.raises(ConfigError, match="platform and station missing"):
        parse(link_table(platform=None, station=None))


@pytest.mark.parametrize(
    "key", ["base_rate_bps", "day_factor", "twilight", "longitude_deg", "qber_mean", "mean_cloud_s"]
)
def test_fixed_rate_keys_are_refused_on_a_physical_link(key: str) -> None:
    with pytest.raises(ConfigError, match=f"takes no fixed-rate key: remove {key};"):
        parse(link_table(**{key: 0.1}))
    with pytest.raises(ConfigError, match=rf"remove {key} \(set in \[defaults\]\)"):
        parse(link_table(), defaults={key: 0.1})


def test_a_platform_below_the_horizon_of_the_link_model_is_refused() -> None:
    # 5 degrees of arc away at 20 km is below the horizon (the plan's geometry).
    with pytest.raises(ConfigError, match=r"below the 5\.0 deg the link model flies"):
        parse(link_table(platform={"latitude_deg": 63.0, "longitude_deg": 11.0}))


def test_the_command_refuses_a_bad_table_and_starts_nothing(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    started: list[object] = []
    monkeypatch.setattr(asyncio, "run", started.append)
    path = tmp_path / "links.toml"
    path.write_text(
        'link = [{link_id = "link-harrow", relay_url = "http://127.0.0.1:1", '
        'station_url = "http://127.0.0.1:2", optics = {fov_urad = -3}, '
        "platform = {latitude_deg = 58.0, longitude_deg = 11.0}, "
        "station = {latitude_deg = 58.05, longitude_deg = 11.1}}]\n"
    )
    tomllib.loads(path.read_text())  # the file itself is valid TOML
    result = CliRunner().invoke(links.main, ["--config", str(path)])
    assert result.exit_code == 1
    assert "link link-harrow: optics.fov_urad: must be" in result.output
    assert started == []


# -- the rate and QBER come from the link model ---------------------------------------


@pytest.mark.parametrize(
    "when",
    [MIDSUMMER.replace(hour=23, minute=16), datetime(2026, 12, 21, 22, 0, tzinfo=UTC)],
)
def test_rate_at_night_is_the_link_models(when: datetime) -> None:
    prof = profile()
    state = model(prof, start=when.replace(hour=0, minute=0)).state_at(when.timestamp())
    point = reference(prof, when)
    assert point.secret_key_rate_bps > 0 and point.qber is not None
    assert state.weather is Weather.CLEAR and state.on_station
    assert state.rate_bps == state.planned_rate_bps == point.secret_key_rate_bps
    assert state.planned_qber == point.qber
    assert state.sun_elevation_deg == point.sun_elevation_deg
    # The emulated time reaches the sun as UTC: PyEphem (no refraction) agrees within
    # 0.05 degrees, the accuracy of Meeus's low-accuracy Sun.
    observer = ephem.Observer()
    observer.lat, observer.lon = str(STATION["latitude_deg"]), str(STATION["longitude_deg"])
    observer.pressure, observer.date = 0, when.replace(tzinfo=None)
    assert state.sun_elevation_deg == pytest.approx(math.degrees(ephem.Sun(observer).alt), abs=0.05)


def test_no_key_while_the_platform_is_off_station() -> None:
    prof = profile(platform={"on_station_hours": [(2.0, 20.0)]})
    emulated = model(prof)
    for hour, on in ((0.5, False), (1.99, False), (2.0, True), (12.0, True), (20.5, False)):
        state = emulated.state_at(MIDSUMMER.timestamp() + hour * HOUR)
        assert state.on_station is on is prof.platform.on_station(hour)
        assert state.rate_bps == (state.planned_rate_bps if on else 0.0)
    assert emulated.state_at(MIDSUMMER.timestamp() + 0.5 * HOUR).planned_rate_bps > 0


def test_no_key_under_cloud_and_the_planned_rate_when_clear() -> None:
    emulated = model(profile(station={"clear_sky": 0.5, "mean_cloud_spell_s": 600.0}))
    seen = set()
    for i in range(600):  # ten hours of a June night and dawn, every minute
        state = emulated.state_at(MIDSUMMER.timestamp() + 20 * HOUR + i * MINUTE)
        seen.add(state.weather)
        clear = state.weather is Weather.CLEAR
        assert state.rate_bps == (state.planned_rate_bps if clear else 0.0)
    assert seen == {Weather.CLEAR, Weather.CLOUD}


def test_daylight_costs_rate_and_raises_the_qber_as_the_model_says() -> None:
    # June solstice at 58.05 N: local solar noon near 11:16 UTC and midnight near 23:16
    # UTC at 11.1 E. The sun stands at 90 - phi + delta = 55.39 deg at noon and at
    # phi + delta - 90 = -8.51 deg at midnight (delta = 23.44 deg at the solstice, from
    # memory; within 0.1 deg for the minutes around the true noon).
    prof = profile(optics=DAY_CAPABLE, station={"day_radiance": 0.01})
    emulated = model(prof)
    noon_t, midnight_t = (
        MIDSUMMER.replace(hour=11, minute=16),
        MIDSUMMER.replace(hour=23, minute=16),
    )
    noon, midnight = (emulated.state_at(t.timestamp()) for t in (noon_t, midnight_t))
    assert noon.sun_elevation_deg == pytest.approx(90 - 58.05 + 23.44, abs=0.1)
    assert midnight.sun_elevation_deg == pytest.approx(58.05 + 23.44 - 90, abs=0.1)
    assert 0 < noon.rate_bps < midnight.rate_bps
    assert noon.planned_qber is not None and midnight.planned_qber is not None
    assert noon.planned_qber > midnight.planned_qber
    for state, when in ((noon, noon_t), (midnight, midnight_t)):
        point = reference(prof, when)
        assert (state.rate_bps, state.planned_qber) == (point.secret_key_rate_bps, point.qber)
    assert noon.daylight == pytest.approx(noon.rate_bps / emulated.night_rate_bps)
    assert 0 < noon.daylight < midnight.daylight <= 1


def test_a_receiver_blinded_by_day_makes_no_key_at_noon() -> None:
    # The model's default receiver (1 nm, 100 urad) under a day sky of 0.03.
    emulated = model(profile())
    noon = emulated.state_at(MIDSUMMER.replace(hour=11, minute=16).timestamp())
    assert (noon.rate_bps, noon.planned_rate_bps, noon.planned_qber) == (0.0, 0.0, None)
    assert noon.weather is Weather.CLEAR and noon.on_station and noon.daylight == 0.0


def test_a_cv_link_has_no_qber_and_no_daylight_penalty() -> None:
    emulated = model(profile(optics={"protocol": "cv-gg02"}))
    noon = emulated.state_at(MIDSUMMER.replace(hour=11, minute=16).timestamp())
    assert noon.planned_qber is None and noon.rate_bps > 0 and noon.daylight == 1.0


# -- clouds ---------------------------------------------------------------------------


@pytest.mark.parametrize(("p", "spell"), [(0.3, HOUR), (0.7, 1800.0), (0.9, 2 * HOUR)])
def test_long_run_clear_share_is_the_clear_probability(p: float, spell: float) -> None:
    # Two-state chain, cloud spells of mean b, clear spells of mean c = b p / (1 - p):
    # stationary clear share c / (b + c) = p (textbook result; availability.py assumes
    # the same process). Over ten years the share's standard error is
    # sqrt(2 p (1 - p) tau / T) with tau = b p, at most 0.003 here; tolerance 0.012.
    emulated = model(profile(station={"clear_sky": p, "mean_cloud_spell_s": spell}), seed=4)
    start, span = MIDSUMMER.timestamp(), 3652 * DAY
    totals = emulated.weather_time(start, start + span)
    assert totals[Weather.CLEAR] + totals[Weather.CLOUD] == pytest.approx(span)
    assert totals[Weather.CLEAR] / span == pytest.approx(p, abs=0.012)


def test_mean_cloud_spell_is_the_stations() -> None:
    emulated = model(profile(station={"clear_sky": 0.5, "mean_cloud_spell_s": 2 * HOUR}), seed=2)
    spells: dict[Weather, list[float]] = {Weather.CLEAR: [], Weather.CLOUD: []}
    t = emulated.state_at(emulated.start).weather_until
    for _ in range(8000):
        state = emulated.state_at(t)
        spells[state.weather].append(state.weather_until - t)
        t = state.weather_until
    # Exponential spells, 4000 of each: standard error of the mean 1.6 %.
    assert statistics.fmean(spells[Weather.CLOUD]) == pytest.approx(2 * HOUR, rel=0.06)
    assert statistics.fmean(spells[Weather.CLEAR]) == pytest.approx(2 * HOUR, rel=0.06)


def test_clear_share_follows_the_month() -> None:
    monthly = [0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.7, 0.6, 0.5, 0.4, 0.3]
    emulated = model(
        profile(station={"clear_sky": monthly, "mean_cloud_spell_s": HOUR}),
        start=datetime(2026, 1, 1, tzinfo=UTC),
        seed=6,
    )
    clear = [0.0] * 12
    total = [0.0] * 12
    for year in range(2026, 2032):
        for month in range(1, 13):
            t0 = datetime(year, month, 1, tzinfo=UTC).timestamp()
            nxt = datetime(year + month // 12, month % 12 + 1, 1, tzinfo=UTC).timestamp()
            clear[month - 1] += emulated.weather_time(t0, nxt)[Weather.CLEAR]
            total[month - 1] += nxt - t0
    # Six Januaries etc. (about 4400 h each): standard error below 0.008; 0.03 allows
    # for it and for spells carried across the month's edges.
    for month, p in enumerate(monthly):
        assert clear[month] / total[month] == pytest.approx(p, abs=0.03), month + 1


def test_hours_of_certain_sky_are_certain() -> None:
    # Clear for certain 20-04 UTC, cloud for certain 10-14 UTC, 0.5 otherwise: as the
    # plan counts them (expected rate = rate x p for each hour).
    row = [1.0 if h >= 20 or h < 4 else 0.0 if 10 <= h < 14 else 0.5 for h in range(24)]
    emulated = model(profile(station={"clear_sky": [row] * 12, "mean_cloud_spell_s": HOUR}))
    start = MIDSUMMER.timestamp()
    for day in range(60):
        night = emulated.weather_time(start + day * DAY + 20 * HOUR, start + day * DAY + 28 * HOUR)
        midday = emulated.weather_time(start + day * DAY + 10 * HOUR, start + day * DAY + 14 * HOUR)
        assert night[Weather.CLOUD] == 0.0 and midday[Weather.CLEAR] == 0.0, day
    both = emulated.weather_time(start, start + 60 * DAY)
    assert both[Weather.CLEAR] > 0 and both[Weather.CLOUD] > 0
    never = model(profile(station={"clear_sky": 0.0, "mean_cloud_spell_s": HOUR}))
    assert never.weather_time(start, start + 30 * DAY)[Weather.CLEAR] == 0.0
    always = model(profile(station={"clear_sky": 1.0, "mean_cloud_spell_s": 0.0}))
    assert math.isinf(always.state_at(start).weather_until)


def test_emulated_days_agree_with_the_plan() -> None:
    # A CV link (no daylight penalty, so a constant rate) on station 06-18 UTC under
    # p = 0.6, b = 30 min. The mean of emulated days must be the plan's expected bits
    # (availability.day_profile), within 4 standard errors. The day's spread is checked
    # against the variance of a telegraph process's clear time over a window T, the
    # double integral of its autocovariance p q exp(-|t| / tau):
    # 2 p q tau^2 (T / tau - 1 + exp(-T / tau)) (from memory; autocovariance as quoted
    # in availability.py from Gardiner). The plan's sd_bits, which treats each hour as
    # all clear or all cloud, is larger (conservative).
    p, b = 0.6, 1800.0
    prof = profile(
        optics={"protocol": "cv-gg02"},
        platform={"on_station_hours": [(6.0, 18.0)]},
        station={"clear_sky": p, "mean_cloud_spell_s": b},
    )
    start = datetime(2026, 1, 1, tzinfo=UTC)
    plan = availability.day_profile(prof.optics, prof.platform, prof.station, start.date())
    days: list[float] = []
    for seed in (1, 2):
        emulated = model(prof, start=start, seed=seed)
        for d in range(365):
            bits = 0.0
            for h in range(24):
                t = start.timestamp() + d * DAY + h * HOUR
                state = emulated.state_at(t + HOUR / 2)
                if state.on_station:
                    clear = emulated.weather_time(t, t + HOUR)[Weather.CLEAR]
                    bits += state.planned_rate_bps * clear
            days.append(bits)
    rate = model(prof, start=start).state_at(start.timestamp() + 12 * HOUR).planned_rate_bps
    tau, window = b * p, 12 * HOUR
    exact_sd = rate * math.sqrt(
        2 * p * (1 - p) * tau**2 * (window / tau - 1 + math.exp(-window / tau))
    )
    mean, sd = statistics.fmean(days), statistics.stdev(days)
    assert mean == pytest.approx(plan.expected_bits, abs=4 * exact_sd / math.sqrt(len(days)))
    assert sd == pytest.approx(exact_sd, rel=0.15)
    assert exact_sd < plan.sd_bits


# -- determinism and the cache --------------------------------------------------------


def states(emulated: PhysicalLinkModel, times: list[float]) -> list[tuple[object, ...]]:
    return [
        (s.weather, s.weather_until, s.rate_bps, s.planned_qber, s.on_station)
        for s in (emulated.state_at(t) for t in times)
    ]


def test_same_seed_and_start_give_the_same_link_in_any_order() -> None:
    prof = profile(
        platform={"on_station_hours": [(20.0, 8.0)]},
        station={"clear_sky": 0.6, "mean_cloud_spell_s": HOUR},
    )
    times = [MIDSUMMER.timestamp() + i * 1337.0 for i in range(400)]
    forward = states(model(prof, seed=9), times)
    assert states(model(prof, seed=9), times) == forward
    assert states(model(prof, seed=9), times[::-1])[::-1] == forward
    assert states(model(prof, seed=10), times) != forward


def test_the_model_is_evaluated_once_per_emulated_minute(monkeypatch: pytest.MonkeyPatch) -> None:
    prof = profile()
    calls: list[datetime] = []
    original = link.at

    def counting(*args: Any) -> link.LinkPoint:
        calls.append(args[3])
        return original(*args)

    monkeypatch.setattr(link, "at", counting)
    emulated = model(prof)
    dawn = MIDSUMMER.replace(hour=1).timestamp()
    for i in range(30 * 6):  # 30 minutes, every 10 seconds
        emulated.state_at(dawn + i * 10.0)
    assert len(calls) == 30
    assert [c.second for c in calls] == [0] * 30


def test_the_cache_moves_the_answer_less_than_the_model_moves_in_a_minute() -> None:
    # Dawn at 58 N in June (01:00-03:00 UTC): the sky brightens and the rate falls
    # fastest. Within each minute the held answer stays between the model's values at
    # the minute's two ends (the rate falls monotonically through dawn).
    prof = profile(optics=DAY_CAPABLE, station={"day_radiance": 0.01})
    emulated = model(prof)
    dawn = MIDSUMMER.replace(hour=1).timestamp()
    moved = False
    for minute in range(0, 120, 7):
        t0 = dawn + minute * MINUTE
        ends = [reference(prof, datetime.fromtimestamp(t0 + s, UTC)) for s in (0.0, MINUTE)]
        step = abs(ends[1].secret_key_rate_bps - ends[0].secret_key_rate_bps)
        moved = moved or step > 0
        for second in (0.0, 17.0, 42.5, 59.9):
            held = emulated.state_at(t0 + second).rate_bps
            exact = reference(prof, datetime.fromtimestamp(t0 + second, UTC))
            assert abs(held - exact.secret_key_rate_bps) <= step * (1 + 1e-9) + 1e-9
    assert moved


# -- the engine: blocks carry the model's QBER ----------------------------------------


def run_emulator(prof: PhysicalProfile, at: datetime) -> tuple[LinkStats, list[dict[str, Any]]]:
    """Run the emulator for 0.6 real seconds at ``at`` (time scale 1) against a mock node
    that accepts everything; return its stats and the blocks the relay end received."""
    pushed: list[dict[str, Any]] = []

    def accept(request: httpx.Request) -> httpx.Response:
        blocks = json.loads(request.content)["blocks"]
        if request.url.host == "relay.test":
            pushed.extend(blocks)
        bits = 8 * sum(len(b["key"]) * 3 // 4 for b in blocks)
        return httpx.Response(
            200, json={"accepted": len(blocks), "duplicates": 0, "accepted_bits": bits}
        )

    spec = LinkSpec(
        link_id="link-harrow",
        relay_url="https://relay.test",
        station_url="https://station.test",
        relay_identity=None,
        station_identity=None,
        model=prof,
        seed=3,
        block_bytes=96,
    )
    http: list[httpx.AsyncClient] = []

    def factory(url: str, identity: TlsIdentity | None) -> AsyncModuleClient:
        http.append(httpx.AsyncClient(transport=httpx.MockTransport(accept)))
        return AsyncModuleClient(url, client=http[-1], attempts=1)

    async def go() -> dict[str, LinkStats]:
        emulator = LinkEmulator(
            [spec],
            start=at.timestamp(),
            tick_seconds=0.05,
            push_interval_seconds=0.05,
            drain_seconds=2.0,
            binary=False,
            client_factory=factory,
        )
        try:
            return await emulator.run(0.6)
        finally:
            for client in http:
                await client.aclose()

    return asyncio.run(go())["link-harrow"], pushed


def test_blocks_carry_the_models_qber_and_stats_show_the_sky() -> None:
    prof = profile(optics={"clock_hz": 1e5})
    at = MIDSUMMER.replace(hour=23, minute=16)
    stats, pushed = run_emulator(prof, at)
    point = reference(prof, at)
    assert point.qber is not None
    assert stats.mode == "physical" and stats.weather == "clear" and stats.on_station
    assert stats.rate_bps == stats.planned_rate_bps == point.secret_key_rate_bps
    assert stats.planned_qber == point.qber and stats.sun_elevation_deg == point.sun_elevation_deg
    assert len(pushed) == stats.blocks_generated > 0
    assert {b["qber"] for b in pushed} == {point.qber}
    line = links.summary_line(stats)
    assert "clear on station" in line and f"QBER {100 * point.qber:.2f} %" in line
    assert f"sun {point.sun_elevation_deg:+5.1f} deg" in line
    assert f"planned {point.secret_key_rate_bps / 1000:.2f} kbit/s" in line
    data = json.loads(links._json_line(stats))
    assert (data["mode"], data["on_station"], data["planned_qber"]) == (
        "physical",
        True,
        point.qber,
    )


def test_no_blocks_while_the_model_makes_no_key_or_the_platform_is_away() -> None:
    noon = MIDSUMMER.replace(hour=11, minute=16)
    stats, pushed = run_emulator(profile(optics={"clock_hz": 1e7}), noon)
    assert (stats.blocks_generated, pushed, stats.rate_bps, stats.planned_qber) == (0, [], 0, None)
    away = profile(optics={"clock_hz": 1e5}, platform={"on_station_hours": [(2.0, 20.0)]})
    stats, pushed = run_emulator(away, MIDSUMMER)
    assert (stats.blocks_generated, pushed, stats.on_station) == (0, [], False)
    assert stats.planned_rate_bps > 0
    assert "off station" in links.summary_line(stats)


def test_cv_blocks_carry_a_qber_of_zero() -> None:
    stats, pushed = run_emulator(
        profile(optics={"protocol": "cv-gg02", "clock_hz": 1e5}), MIDSUMMER
    )
    assert pushed and {b["qber"] for b in pushed} == {0.0}
    assert stats.planned_qber is None
    assert "QBER -" in links.summary_line(stats)


def test_physical_profile_checks_qber_sd() -> None:
    prof = profile()
    with pytest.raises(ValueError, match="qber_sd"):
        PhysicalProfile(prof.optics, prof.platform, prof.station, qber_sd=-0.1)
