"""``keystrata plan``: the node's key-supply plan as tables, JSON or plots."""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

import click
from rich.table import Table

from keystrata.cli.common import console, print_json
from keystrata.cli.remote_cmd import connection_options, operator


def _si(value: float | None, unit: str) -> str:
    """``1.23 Mbit/s``-style figures: one unit per screen, SI prefixes."""
    if value is None:
        return "-"
    for factor, prefix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(value) >= factor:
            return f"{value / factor:.3g} {prefix}{unit}"
    return f"{value:.3g} {unit}"


def _duration(seconds: float | None) -> str:
    if seconds is None:
        return "-"
    if seconds >= 2 * 86_400:
        return f"{seconds / 86_400:.1f} d"
    if seconds >= 7200:
        return f"{seconds / 3600:.1f} h"
    return f"{seconds / 60:.0f} min"


def _num(value: float | None, fmt: str) -> str:
    return "-" if value is None else format(value, fmt)


def _transposed(title: str, rows: list[dict[str, Any]], key: str, lines: list[Line]) -> Table:
    """One column per link or pair, one line per figure: fits 80 columns for a few."""
    table = Table(title=title)
    table.add_column("")
    names = [str(row[key]) for row in rows]
    # IDs that all start alike ("pair-", "link-") lose that start in the header.
    cut = os.path.commonprefix(names).rpartition("-")[0]  # noqa: RUF071 (by character)
    for name in names:
        table.add_column(name[len(cut) + 1 :] if cut else name, justify="right")
    for label, show in lines:
        cells = [show(row) if row["planned"] else "-" for row in rows]
        table.add_row(label, *cells)
    missing = [", ".join(row["missing"]) if not row["planned"] else "" for row in rows]
    if any(missing):
        table.add_row("missing", *missing)
    return table


Line = tuple[str, Callable[[dict[str, Any]], str]]

LINK_LINES: list[Line] = [
    ("protocol", lambda r: str(r["protocol"])),
    ("slant range", lambda r: _si(r["slant_range_m"], "m")),
    ("elevation", lambda r: _num(r["elevation_deg"], ".1f") + " deg"),
    ("footprint", lambda r: _si(r["footprint_diameter_m"], "m")),
    ("geometric loss", lambda r: _num(r["geometric_loss_db"], ".1f") + " dB"),
    ("total loss", lambda r: _num(r["total_loss_db"], ".1f") + " dB"),
    ("QBER", lambda r: "-" if r["qber"] is None else f"{100 * r['qber']:.2f} %"),
    ("key rate (best hour)", lambda r: _si(r["secret_key_rate_bps"], "bit/s")),
    ("PLOB bound", lambda r: _si(r["plob_bound_bps"], "bit/s")),
    ("below the bound", lambda r: _num(r["below_plob_db"], ".1f") + " dB"),
    ("expected per day", lambda r: _si(r["daily_secret_bits"], "bit")),
    ("spread (1 sd)", lambda r: _si(r["daily_secret_bits_sd"], "bit")),
]


def _until_empty(r: dict[str, Any]) -> str:
    if r["time_until_empty_s"] is None and r["ready_bits"] is not None and r["daily_demand_bits"]:
        return "never"
    return _duration(r["time_until_empty_s"])


PAIR_LINES: list[Line] = [
    ("supply per day", lambda r: _si(r["daily_supply_bits"], "bit")),
    ("demand per day", lambda r: _si(r["daily_demand_bits"], "bit")),
    ("demand from", lambda r: r["demand_source"] or "unknown"),
    ("surplus per day", lambda r: _si(r["daily_surplus_bits"], "bit")),
    ("until empty", _until_empty),
    ("buffer (99 %)", lambda r: _si(r["buffer_bits_needed"], "bit")),
]


def links_table(answer: dict[str, Any]) -> Table:
    title = f"QKD links planned at {answer['node_id']} for {answer['day']} (UTC)"
    return _transposed(title, answer["links"], "link_id", LINK_LINES)


def pairs_table(answer: dict[str, Any]) -> Table:
    title = f"pairs planned at {answer['node_id']} for {answer['day']} (UTC)"
    return _transposed(title, answer["pairs"], "pair_id", PAIR_LINES)


@click.command("plan")
@click.option("--day", metavar="YYYY-MM-DD", default=None, help="UTC day to plan (default: today)")
@click.option(
    "--plots",
    "plots_dir",
    type=click.Path(file_okay=False, path_type=Path),
    default=None,
    help="also write plots into this folder",
)
@click.option(
    "--format",
    "plot_format",
    type=click.Choice(["png", "svg"]),
    default="png",
    show_default=True,
    help="image format of the plots",
)
@connection_options
def plan(
    day: str | None,
    plots_dir: Path | None,
    plot_format: str,
    url: str,
    ca: Path,
    cert: Path,
    key: Path,
    as_json: bool,
) -> None:
    """Plan key supply from the link model: per link the geometry, link budget, QBER and
    secret key rate beside the PLOB bound, and the expected bits per day; per pair the
    daily supply against demand, time until empty and the buffer that rides out a cloud
    spell. Engineering estimates, not a security proof."""
    with operator(url, ca, cert, key) as client:
        answer = client.plan(day)
    written: list[Path] = []
    if plots_dir is not None:
        from keystrata.cli import plan_plots

        written = plan_plots.write_all(answer, plots_dir, plot_format)
    if as_json:
        print_json(answer)
        return
    console.print(links_table(answer))
    console.print(pairs_table(answer))
    console.print(f"[dim]{answer['caution']}[/dim]", highlight=False)
    for path in written:
        console.print(f"wrote {path}", highlight=False)
