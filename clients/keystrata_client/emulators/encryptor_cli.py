"""``keystrata-encryptors``: emulate pairs of encryptors rekeying over ETSI GS QKD 014.

    keystrata-encryptors --config encryptors.toml [--duration S] [--rekeys N] [--json] [-v]

Reads the TOML file described in ``encryptor_config.py`` and runs every pair (see
``encryptors.py``): the master SAE calls Get key at its station, passes the key IDs and
the SHA-256 of each key to its slave, the slave calls Get key with key IDs at the other
station and compares digests. Every ``summary_seconds`` and at the end it prints a table,
one row per pair: rekeys, keys delivered, matches, mismatches, times it waited for key
(503s while no key was ready: a running total), keys lost and failures by kind. Never
key bytes, only counts.

The run ends after ``--duration`` seconds, when every pair has handed ``--rekeys`` sets
of keys to its slave, or on Ctrl-C (or SIGTERM), whichever comes first; then slaves
fetch the key IDs already passed to them for up to ``drain_seconds``. Without either
option it runs until Ctrl-C.

Exit codes: 0 done and no key differed; 3 some key differed between master and slave
(a mismatch); 1 configuration or TLS files unusable; 2 usage error.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import signal
import sys
from dataclasses import asdict
from datetime import datetime
from pathlib import Path
from typing import Any

import click

from keystrata_client._errors import ConnectionProblem
from keystrata_client._tls import TlsIdentity
from keystrata_client._units import si
from keystrata_client.emulators.config import ConfigError
from keystrata_client.emulators.encryptor_config import EncryptorConfig, load_encryptor_config
from keystrata_client.emulators.encryptors import COLUMNS, EncryptorEmulator, PairStats
from keystrata_client.keys import AsyncKeyClient

__all__ = ["EXIT_MISMATCH", "build_emulator", "main", "table"]

#: Exit code when a key differed between the two ends of a pair.
EXIT_MISMATCH = 3

#: (stats field, alignment) of the table's columns; headers from :data:`COLUMNS`.
_FIELDS = (
    ("name", "<"),
    ("rekeys_attempted", ">"),
    ("keys_delivered", ">"),
    ("bits_delivered", ">"),
    ("matches", ">"),
    ("mismatches", ">"),
    ("times_waited_for_key", ">"),
    ("keys_lost", ">"),
    ("errors", "<"),
)
_COLUMNS = tuple((COLUMNS[name], align) for name, align in _FIELDS)


def _failures(stats: PairStats) -> str:
    return " ".join(f"{kind}={n}" for kind, n in sorted(stats.errors.items())) or "-"


def table(stats: dict[str, PairStats]) -> str:
    """Return a plain-text table with one row per pair (counts only, no key material)."""
    rows = [
        (
            name,
            f"{st.rekeys_attempted:,}",
            f"{st.keys_delivered:,}",
            si(st.bits_delivered, "bit"),
            f"{st.matches:,}",
            f"{st.mismatches:,}",
            f"{st.times_waited_for_key:,}",
            f"{st.keys_lost:,}",
            _failures(st),
        )
        for name, st in sorted(stats.items())
    ]
    widths = [max(len(head), *(len(r[i]) for r in rows)) for i, (head, _) in enumerate(_COLUMNS)]

    def line(cells: tuple[str, ...]) -> str:
        parts = [f"{c:{a}{w}}" for c, (_, a), w in zip(cells, _COLUMNS, widths, strict=True)]
        return "  ".join(parts).rstrip()

    out = [line(tuple(head for head, _ in _COLUMNS))]
    out.append("  ".join("-" * w for w in widths))
    out += [line(r) for r in rows]
    return "\n".join(out)


def _json_line(stats: PairStats, final: bool) -> str:
    data: dict[str, Any] = {
        k: v.isoformat() if isinstance(v, datetime) else v for k, v in asdict(stats).items()
    }
    data["final"] = final
    return json.dumps(data, sort_keys=True)


def _emit(stats: dict[str, PairStats], as_json: bool, final: bool) -> None:
    if as_json:
        for name in sorted(stats):
            click.echo(_json_line(stats[name], final))
    else:
        click.echo(table(stats) + "\n")


def _check_identity(name: str, end: str, identity: TlsIdentity | None) -> None:
    if identity is None:
        return
    try:
        identity.checked_ssl_context()
    except ConnectionProblem as exc:
        raise ConfigError(f"pair {name}, {end}: {exc}") from exc


def build_emulator(config: EncryptorConfig) -> EncryptorEmulator:
    """Return an emulator for ``config``, after opening every TLS identity once.

    Raises:
        ConfigError: an option is out of range, or a certificate, key or CA file is
            missing or unusable (the message names the pair and the end).
    """
    for spec in config.pairs:
        _check_identity(spec.name, "master", spec.master_identity)
        _check_identity(spec.name, "slave", spec.slave_identity)
    options = config.options
    timeout = options.get("timeout_seconds", 10.0)

    def client(url: str, identity: TlsIdentity | None) -> AsyncKeyClient:
        return AsyncKeyClient(url, identity, timeout=timeout)

    try:
        return EncryptorEmulator(
            config.pairs,
            drain_seconds=options.get("drain_seconds", 5.0),
            slave_patience_seconds=options.get("slave_patience_seconds", 5.0),
            slave_retry_seconds=options.get("slave_retry_seconds", 0.2),
            client_factory=client,
        )
    except ValueError as exc:
        raise ConfigError(f"emulator: {exc}") from exc


async def _run(
    emulator: EncryptorEmulator,
    duration: float | None,
    rekeys: int | None,
    every: float,
    as_json: bool,
) -> dict[str, PairStats]:
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
            _emit(emulator.stats, as_json, final=False)

    reporter = asyncio.create_task(report())
    try:
        stats = await emulator.run(duration, rekeys=rekeys)
    finally:
        reporter.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await reporter
        for sig in signals:
            with contextlib.suppress(NotImplementedError, ValueError):
                loop.remove_signal_handler(sig)
    _emit(stats, as_json, final=True)
    return stats


@click.command(context_settings={"help_option_names": ["-h", "--help"]})
@click.option(
    "--config",
    "config_path",
    required=True,
    type=click.Path(dir_okay=False, path_type=Path),
    help="TOML file naming the encryptor pairs.",
)
@click.option(
    "--duration",
    type=click.FloatRange(min=0, min_open=True),
    default=None,
    help="Seconds to run (default: until --rekeys are done or Ctrl-C).",
)
@click.option(
    "--rekeys",
    type=click.IntRange(min=1),
    default=None,
    help="Stop each pair after it handed this many sets of keys to its slave.",
)
@click.option("--json", "as_json", is_flag=True, help="Print one JSON line per pair instead.")
@click.option("-v", "--verbose", count=True, help="-v: log progress; -vv: every request.")
def main(
    config_path: Path, duration: float | None, rekeys: int | None, as_json: bool, verbose: int
) -> None:
    """Emulate pairs of encryptors that rekey over ETSI GS QKD 014 and compare keys."""
    logging.basicConfig(
        level=logging.INFO if verbose else logging.WARNING,
        format="%(asctime)s %(levelname)s %(message)s",
    )
    # httpx logs every request at INFO: only with -vv.
    logging.getLogger("httpx").setLevel(logging.INFO if verbose > 1 else logging.WARNING)
    try:
        config = load_encryptor_config(config_path)
        emulator = build_emulator(config)
    except ConfigError as exc:
        raise click.ClickException(str(exc)) from exc
    every = config.options.get("summary_seconds", 5.0)
    stats = asyncio.run(_run(emulator, duration, rekeys, every, as_json))
    differed = sum(st.mismatches for st in stats.values())
    if differed:
        click.echo(f"error: {differed} key(s) differed between master and slave", err=True)
        sys.exit(EXIT_MISMATCH)
