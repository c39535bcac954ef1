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
from keystrata.cli.units import HUMAN, Units, si


def _num(value: float | None, fmt: str) -> str:
    return "-" if value is None else format(value, fmt)


def _transposed(
    title: str, rows: list[dict[str, Any]], key: str, lines: list[Line], units: Units
) -> Table:
    """One column per link or pair, one line per figure: fits 80 columns for a few."""
    table = Table(title=title)
    table.add_column("")
    names = [str(row[key]) for row in rows]
    # IDs that all start alike ("pair-", "link-") lose that start in the header; a
    # single ID is shown whole (it starts like itself).
    cut = ""
    if len(set(names)) > 1:
        cut = os.path.commonprefix(names).rpartition("-")[0]  # noqa: RUF071 (by character)
    for name in names:
        table.add_column(name[len(cut) + 1 :] if cut else name, justify="right")
    for label, show in lines:
        cells = [show(row, units) if row["planned"] else "-" for row in rows]
        table.add_row(label, *cells)
    missing = [", ".join(row["missing"]) if not row["planned"] else "" for row in rows]
    if any(missing):
        table.add_row("missing", *missing)
    return table


Line = tuple[str, Callable[[dict[str, Any], Units], str]]

LINK_LINES: list[Line] = [
    ("protocol", lambda r, u: str(r["protocol"])),
    ("slant range", lambda r, u: si(r["slant_range_m"], "m")),
    ("elevation", lambda r, u: _num(r["elevation_deg"], ".1f") + " deg"),
    ("footprint", lambda r, u: si(r["footprint_diameter_m"], "m")),
    ("geometric loss", lambda r, u: _num(r["geometric_loss_db"], ".1f") + " dB"),
    ("total loss", lambda r, u: _num(r["total_loss_db"], ".1f") + " dB"),
    ("QBER", lambda r, u: "-" if r["qber"] is None else f"{100 * r['qber']:.2f} %"),
    ("key rate (best hour)", lambda r, u: u.rate(r["secret_key_rate_bps"])),
    ("PLOB bound", lambda r, u: u.rate(r["plob_bound_bps"])),
    ("below the bound", lambda r, u: _num(r["below_plob_db"], ".1f") + " dB"),
    ("expected per day", lambda r, u: u.bits(r["daily_secret_bits"])),
    ("spread (1 sd)", lambda r, u: u.bits(r["daily_secret_bits_sd"])),
]


def _until_empty(r: dict[str, Any], u: Units) -> str:
    if r["time_until_empty_s"] is None and r["ready_bits"] is not None and r["daily_demand_bits"]:
        return "never"
    return u.duration(r["time_until_empty_s"])


PAIR_LINES: list[Line] = [
    ("supply per day", lambda r, u: u.bits(r["daily_supply_bits"])),
    ("demand per day", lambda r, u: u.bits(r["daily_demand_bits"])),
    ("demand from", lambda r, u: r["demand_source"] or "unknown"),
    ("surplus per day", lambda r, u: u.bits(r["daily_surplus_bits"])),
    ("until empty", _until_empty),
    ("buffer (99 %)", lambda r, u: u.bits(r["buffer_bits_needed"])),
]


def links_table(answer: dict[str, Any], units: Units = HUMAN) -> Table:
    title = f"QKD links planned at {answer['node_id']} for {answer['day']} (UTC)"
    return _transposed(title, answer["links"], "link_id", LINK_LINES, units)


def pairs_table(answer: dict[str, Any], units: Units = HUMAN) -> Table:
    title = f"pairs planned at {answer['node_id']} for {answer['day']} (UTC)"
    return _transposed(title, answer["pairs"], "pair_id", PAIR_LINES, units)


@click.command("plan")
@click.option(
    "--day", metavar="YYYY-MM-DD", default=None, help="The UTC day to plan [default: today]."
)
@click.option(
    "--plots",
    "plots_dir",
    type=click.Path(file_okay=False, path_type=Path),
    default=None,
    help="Also write plots into this folder.",
)
@click.option(
    "--format",
    "plot_format",
    type=click.Choice(["png", "svg"]),
    default="png",
    show_default=True,
    help="Image format of the plots.",
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
    exact: bool,
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
    console.print(links_table(answer, Units(exact)))
    console.print(pairs_table(answer, Units(exact)))
    console.print(f"[dim]{answer['caution']}[/dim]", highlight=False)
    for path in written:
        console.print(f"wrote {path}", highlight=False)
