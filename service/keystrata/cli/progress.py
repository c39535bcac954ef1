"""Progress bars for long work (exports, reconciliation, KEK rotation, migrations,
applying a network description), shown on stderr only when stdout is a terminal:
scripts and pipes see nothing of them."""

from __future__ import annotations

import sys
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any


class Tracker:
    """What a task tells its bar: work done since the last call, or done and total."""

    def advance(self, amount: int) -> None:
        """Count ``amount`` more units of work done."""

    def update(self, done: int, total: int | None) -> None:
        """Set the work done so far and the total (None: unknown)."""

    def describe(self, text: str) -> None:
        """Say what is being done now (the bar's text)."""


class _Shown(Tracker):
    def __init__(self, progress: Any, task: Any) -> None:
        self._progress, self._task = progress, task

    def advance(self, amount: int) -> None:
        self._progress.advance(self._task, amount)

    def update(self, done: int, total: int | None) -> None:
        self._progress.update(self._task, completed=done, total=total)

    def describe(self, text: str) -> None:
        self._progress.update(self._task, description=text)


def wanted() -> bool:
    """True when a person watches: stdout is a terminal."""
    return sys.stdout.isatty()


@contextmanager
def bar(description: str, total: int | None = None, *, unit: str = "") -> Iterator[Tracker]:
    """Yield the :class:`Tracker` of one task of ``total`` (None: unknown) units; a rich
    progress bar on stderr while a terminal watches, else one that shows nothing.
    ``unit="bytes"`` shows sizes (kB, MB) instead of counts."""
    if not wanted() or total == 0:
        yield Tracker()
        return
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        DownloadColumn,
        MofNCompleteColumn,
        Progress,
        TextColumn,
        TimeElapsedColumn,
    )

    count: Any = DownloadColumn() if unit == "bytes" else MofNCompleteColumn()
    with Progress(
        TextColumn("{task.description}"),
        BarColumn(),
        count,
        TimeElapsedColumn(),
        console=Console(stderr=True),
        transient=True,
    ) as progress:
        yield _Shown(progress, progress.add_task(description, total=total))
