"""``keystrata-links``: emulate the QKD modules of relay-station QKD links.

    keystrata-links --config links.toml [--duration S] [--json] [-v]

Reads the TOML file described in ``config.py``, pushes identical link key blocks to the
relay and station end of every link (see ``engine.py``), and prints one summary line per
link every ``summary_seconds``: emulated time, weather, rate, blocks made and, per end,
blocks acknowledged, duplicates, errors and backlog. A link in physical mode shows
instead of the daylight factor whether the platform is on station, the sun's elevation
over the station, and the rate emulated beside the planned (clear-sky) rate and QBER.
Never key bytes. Ctrl-C (or
SIGTERM) stops generating, drains the queues for up to ``drain_seconds`` and exits;
a second Ctrl-C exits at once.

Exit codes: 0 done, 1 configuration or TLS files unusable, 2 usage error.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import signal
import ssl
from dataclasses import asdict
from datetime import datetime
from pathlib import Path
from typing import Any

import click

from keystrata_client.emulators.config import ConfigError, EmulatorConfig, load_config
from keystrata_client.emulators.engine import EndStats, LinkEmulator, LinkSpec, LinkStats

__all__ = ["EndStats", "LinkEmulator", "LinkSpec", "LinkStats", "main", "summary_line"]


def _end_text(name: str, end: EndStats) -> str:
    return (
        f"{name} acked {end.blocks_acked} dup {end.duplicates} "
        f"err {end.errors} backlog {end.backlog}"
        + (f" rejected {end.rejected}" if end.rejected else "")
    )


def _sky_text(stats: LinkStats) -> str:
    rate = f"{stats.rate_bps / 1000:8.2f} kbit/s"
    if stats.mode != "physical":
        return f"{stats.weather:<5} {rate} (daylight {stats.daylight:4.2f})"
    station = "on station" if stats.on_station else "off station"
    sun = "-" if stats.sun_elevation_deg is None else f"{stats.sun_elevation_deg:+5.1f}"
    qber = "-" if stats.planned_qber is None else f"{100 * stats.planned_qber:.2f} %"
    return (
        f"{stats.weather:<5} {station:<11} sun {sun} deg {rate} "
        f"(planned {stats.planned_rate_bps / 1000:.2f} kbit/s, QBER {qber})"
    )


def summary_line(stats: LinkStats) -> str:
    """Return one human-readable line for a link's stats (no key material exists in it)."""
    when = stats.emulated_at.strftime("%Y-%m-%d %H:%M") if stats.emulated_at else "-"
    made = f"made {stats.blocks_generated}"
    if stats.blocks_discarded:
        made += f" discarded {stats.blocks_discarded}"
    return (
        f"[{when}Z] {stats.link_id:<18} {_sky_text(stats)} {made} | "
        f"{_end_text('relay', stats.relay)} | {_end_text('station', stats.station)}"
    )


def _json_line(stats: LinkStats) -> str:
    def plain(value: Any) -> Any:
        return value.isoformat() if isinstance(value, datetime) else value

    data = {k: plain(v) for k, v in asdict(stats).items() if not isinstance(v, dict)}
    for end in ("relay", "station"):
        data[end] = {k: plain(v) for k, v in asdict(stats.end(end)).items()}
    return json.dumps(data, sort_keys=True)


def _emit(emulator: LinkEmulator, as_json: bool) -> None:
    for stats in emulator.stats.values():
        click.echo(_json_line(stats) if as_json else summary_line(stats))


def build_emulator(config: EmulatorConfig) -> LinkEmulator:
    """Return an emulator for ``config``, after opening every TLS identity once.

    Raises:
        ConfigError: an option is out of range, or a certificate, key or CA file is
            missing or unusable (the message names the link and the end).
    """
    for spec in config.links:
        for end in ("relay", "station"):
            identity = getattr(spec, f"{end}_identity")
            if identity is None:
                continue
            for path in (identity.ca, identity.cert, identity.key):
                if not path.is_file():
                    raise ConfigError(f"link {spec.link_id}, {end} end: no file {path}")
            try:
                identity.ssl_context()
            except ssl.SSLError as exc:
                raise ConfigError(
                    f"link {spec.link_id}, {end} end: TLS files unusable ({exc.reason or exc})"
                ) from exc
            except OSError as exc:
                raise ConfigError(
                    f"link {spec.link_id}, {end} end: cannot read a TLS file "
                    f"({exc.strerror or exc}: {exc.filename or 'ca, cert or key'})"
                ) from exc
    options = config.options
    start = options.get("start")
    try:
        return LinkEmulator(
            config.links,
            time_scale=options.get("time_scale", 1.0),
            start=start.timestamp() if start is not None else None,
            tick_seconds=options.get("tick_seconds", 0.25),
            push_interval_seconds=options.get("push_interval_seconds", 1.0),
            batch_max_blocks=options.get("batch_max_blocks", 64),
            backlog_max_blocks=options.get("backlog_max_blocks", 4096),
            drain_seconds=options.get("drain_seconds", 5.0),
            binary=options.get("form", "binary") == "binary",
        )
    except ValueError as exc:
        raise ConfigError(f"emulator: {exc}") from exc


async def _run(emulator: LinkEmulator, duration: float | None, every: float, as_json: bool) -> None:
    loop = asyncio.get_running_loop()
    signals = (signal.SIGINT, signal.SIGTERM)

    def on_signal() -> None:
        emulator.stop()
        for sig in signals:
            loop.remove_signal_handler(sig)

    for sig in signals:
        with contextlib.suppress(NotImplementedError):
            loop.add_signal_handler(sig, on_signal)

    async def report() -> None:
        while True:
            await asyncio.sleep(every)
            _emit(emulator, as_json)

    reporter = asyncio.create_task(report())
    try:
        await emulator.run(duration)
    finally:
        reporter.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await reporter
        for sig in signals:
            with contextlib.suppress(NotImplementedError, ValueError):
                loop.remove_signal_handler(sig)
    _emit(emulator, as_json)


@click.command(context_settings={"help_option_names": ["-h", "--help"]})
@click.option(
    "--config",
    "config_path",
    required=True,
    type=click.Path(dir_okay=False, path_type=Path),
    help="TOML file naming the links to emulate.",
)
@click.option(
    "--duration",
    type=click.FloatRange(min=0, min_open=True),
    default=None,
    help="Real seconds to run (default: until Ctrl-C).",
)
@click.option("--json", "as_json", is_flag=True, help="Print summaries as JSON lines.")
@click.option(
    "-v", "--verbose", count=True, help="-v: log weather and recoveries; -vv: every request."
)
def main(config_path: Path, duration: float | None, as_json: bool, verbose: int) -> None:
    """Emulate the QKD modules of relay-station QKD links and push their key."""
    logging.basicConfig(
        level=logging.INFO if verbose else logging.WARNING,
        format="%(asctime)s %(levelname)s %(message)s",
    )
    # httpx logs every request at INFO: only with -vv.
    logging.getLogger("httpx").setLevel(logging.INFO if verbose > 1 else logging.WARNING)
    try:
        config = load_config(config_path)
        emulator = build_emulator(config)
    except ConfigError as exc:
        raise click.ClickException(str(exc)) from exc
    every = float(config.options.get("summary_seconds", 5.0))
    if every <= 0:
        raise click.ClickException("emulator.summary_seconds: must be positive")
    asyncio.run(_run(emulator, duration, every, as_json))
