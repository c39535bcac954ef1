"""Tables that fit the terminal: fewer columns on a narrow one, never a cut word.

A :class:`Sheet` is a table's content: a title, columns and rows of text. Each column
has a drop rank (0: always shown); a cell may have a short form besides its full text.
:func:`fit` returns the widest rich Table that fits the width it is given: all columns
with full cells, else short cells, else without the columns of the highest drop rank,
and so on. The :class:`Screen` fits its sheets at every render, so the live screen
follows the terminal when it is resized, and drops the tables' titles when the terminal
is too low for them.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field

from rich import box
from rich.console import Console, ConsoleOptions, RenderResult
from rich.measure import Measurement
from rich.table import Table
from rich.text import Text

#: Wider than any table, to measure a table's natural width.
_UNBOUNDED = 10_000

#: A cell: its text, or (full text, short text).
Cell = str | tuple[str, str]


@dataclass(frozen=True)
class Column:
    header: str
    justify: str = "right"
    #: Columns of the highest rank go first when the table does not fit; 0 stays.
    drop: int = 0


@dataclass
class Sheet:
    title: str
    columns: Sequence[Column]
    rows: list[Sequence[Cell]] = field(default_factory=list)


def _text(cell: Cell, short: bool) -> str:
    if isinstance(cell, tuple):
        return cell[1] if short else cell[0]
    return cell


def _table(sheet: Sheet, keep: list[int], short: bool, title: bool, wrap: bool) -> Table:
    table = Table(
        title=sheet.title if title else None,
        title_justify="left",
        title_style="bold",
        box=box.SIMPLE_HEAD,
        show_edge=False,
        pad_edge=False,
        padding=(0, 1, 0, 0),
        collapse_padding=True,
    )
    for i in keep:
        col = sheet.columns[i]
        table.add_column(
            col.header,
            justify=col.justify,  # type: ignore[arg-type]
            no_wrap=not wrap,
            overflow="fold",
        )
    for row in sheet.rows:
        table.add_row(*(_text(row[i], short) for i in keep))
    return table


def _choices(sheet: Sheet) -> Iterator[tuple[list[int], bool]]:
    """Column subsets from widest to narrowest, each with full then short cells."""
    for limit in sorted({c.drop for c in sheet.columns}, reverse=True):
        keep = [i for i, c in enumerate(sheet.columns) if c.drop <= limit]
        yield keep, False
        yield keep, True


def fit(sheet: Sheet, console: Console, options: ConsoleOptions, *, title: bool = True) -> Table:
    """The widest form of ``sheet`` whose natural width fits ``options.max_width``;
    below the narrowest form, cells wrap at spaces (and long words fold) rather than
    being cut."""
    last: tuple[list[int], bool] = ([], True)
    # Measured unconstrained: a measurement is clamped to the width it is given.
    unbounded = options.update_width(_UNBOUNDED)
    for keep, short in _choices(sheet):
        table = _table(sheet, keep, short, title, wrap=False)
        if Measurement.get(console, unbounded, table).maximum <= options.max_width:
            return table
        last = (keep, short)
    return _table(sheet, last[0], last[1], title, wrap=True)


def height(table: Table) -> int:
    """Lines ``table`` takes when no cell wraps: title, header, rule, rows."""
    return (1 if table.title else 0) + 2 + table.row_count


class Screen:
    """A headline and tables, each fitted to the console at render time."""

    def __init__(self, headline: str, sheets: Sequence[Sheet]) -> None:
        self.headline = headline
        self.sheets = list(sheets)

    def tables(self, console: Console, options: ConsoleOptions) -> list[Table]:
        """The fitted tables; without their titles when the screen would not fit the
        console's height with them."""
        tables = [fit(s, console, options) for s in self.sheets]
        headline = self._headline().wrap(console, options.max_width)
        lines = len(headline) + sum(height(t) for t in tables)
        if lines > (options.height or console.height):
            tables = [fit(s, console, options, title=False) for s in self.sheets]
        return tables

    def _headline(self) -> Text:
        return Text(self.headline, style="bold", overflow="fold")

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        yield self._headline()
        yield from self.tables(console, options)


class Fitted:
    """One sheet, fitted to the console at render time."""

    def __init__(self, sheet: Sheet) -> None:
        self.sheet = sheet

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        yield fit(self.sheet, console, options)
