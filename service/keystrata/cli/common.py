"""What every command shares: loading settings, one error handler, output helpers.

``console`` and ``err_console`` (rich consoles) are made on first use, so a command that
prints nothing through them (``keystrata serve``) does not import rich.
"""

from __future__ import annotations

import functools
import json
import sys
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import IO, TYPE_CHECKING, Any, TypeVar

import click

from keystrata.config import Settings, load_settings
from keystrata.errors import ConfigError, KeystrataError

if TYPE_CHECKING:
    from rich.console import Console

    console: Console
    err_console: Console

F = TypeVar("F", bound=Callable[..., Any])
_CONSOLES = {"console": False, "err_console": True}  # name -> writes to stderr


def _console(name: str) -> Console:
    made: Console | None = globals().get(name)
    if made is None:
        from rich.console import Console

        made = globals()[name] = Console(stderr=_CONSOLES[name])
    return made


def __getattr__(name: str) -> Any:
    """``console`` and ``err_console``, made on first use (PEP 562)."""
    if name not in _CONSOLES:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    return _console(name)


class CommandError(click.ClickException):
    """A failure shown as ``error: SENTENCE``, an optional ``hint:`` line and detail
    lines; exit status 1. Never a traceback."""

    def __init__(self, message: str, hint: str = "", details: Sequence[str] = ()) -> None:
        super().__init__(message)
        self.hint = hint
        self.details = list(details)

    def show(self, file: IO[Any] | None = None) -> None:
        echo = functools.partial(click.echo, err=True, file=file)
        echo(f"error: {self.message}")
        for line in self.details:
            echo(f"  {line}")
        if self.hint:
            echo(f"hint: {self.hint}")


def config_option(f: F) -> F:
    return click.option(
        "--config",
        "config_path",
        required=True,
        envvar="KEYSTRATA_CONFIG",
        show_envvar=True,
        type=click.Path(dir_okay=False, path_type=Path),
        help="The node's TOML file.",
    )(f)


def settings_from(path: Path) -> Settings:
    return load_settings(path)


@contextmanager
def handled() -> Iterator[None]:
    """Turn our errors, and files that cannot be read, into ``error: ...`` on stderr
    with ``field: problem`` detail lines; exit status 1 (2 for bad configuration)."""
    from keystrata.cli import render

    try:
        yield
    except KeystrataError as exc:
        click.echo(f"error: {exc.message}", err=True)
        for line in render.details(exc.details, said=exc.message):
            click.echo(f"  {line}", err=True)
        sys.exit(2 if isinstance(exc, ConfigError) else 1)
    except OSError as exc:
        # strerror and the path only: an OSError never carries file content.
        where = f"{exc.filename}: " if exc.filename else ""
        click.echo(f"error: {where}{exc.strerror or exc}", err=True)
        sys.exit(1)


def print_json(value: Any) -> None:
    click.echo(json.dumps(value, indent=2, sort_keys=True, default=str))


def print_table(rows: Sequence[dict[str, Any]], columns: Sequence[str], title: str = "") -> None:
    from rich import box
    from rich.table import Table

    from keystrata.cli import render
    from keystrata.cli.units import HUMAN

    def cell(v: Any) -> str:
        return "" if v is None else v if isinstance(v, str) else render.value(v, HUMAN)

    table = Table(title=title or None, box=box.SIMPLE_HEAD)
    for col in columns:
        table.add_column(col)
    for row in rows:
        table.add_row(*(cell(row.get(c)) for c in columns))
    _console("console").print(table)
