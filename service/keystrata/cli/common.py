"""What every command shares: loading settings, one error handler, output helpers."""

from __future__ import annotations

import json
import sys
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any, TypeVar

import click
from rich.console import Console
from rich.table import Table

from keystrata.config import Settings, load_settings
from keystrata.errors import ConfigError, KeystrataError

F = TypeVar("F", bound=Callable[..., Any])

console = Console()
err_console = Console(stderr=True)


def config_option(f: F) -> F:
    return click.option(
        "--config",
        "config_path",
        required=True,
        envvar="KEYSTRATA_CONFIG",
        type=click.Path(dir_okay=False, path_type=Path),
        help="the node's TOML file",
    )(f)


def settings_from(path: Path) -> Settings:
    return load_settings(path)


@contextmanager
def handled() -> Iterator[None]:
    """Turn our errors into a message on stderr and exit code 1 (2 for bad config)."""
    try:
        yield
    except KeystrataError as exc:
        err_console.print(f"[red]error:[/red] {exc.message}", highlight=False)
        for d in exc.details[:20]:
            err_console.print(f"  - {d}", highlight=False)
        sys.exit(2 if isinstance(exc, ConfigError) else 1)


def print_json(value: Any) -> None:
    click.echo(json.dumps(value, indent=2, sort_keys=True, default=str))


def print_table(rows: Sequence[dict[str, Any]], columns: Sequence[str], title: str = "") -> None:
    table = Table(title=title or None)
    for col in columns:
        table.add_column(col)
    for row in rows:
        table.add_row(*("" if row.get(c) is None else str(row.get(c)) for c in columns))
    console.print(table)
