"""``keystrata plan``: the node's key-supply plan as tables, JSON or plots."""

from __future__ import annotations

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


def links_table(answer: dict[str, Any]) -> Table:
    table = Table(title=f"links planned at {answer['node_id']} for {answer['day']} (UTC)")
    columns = (
        ("link", "left"),
        ("protocol", "left"),
        ("range", "right"),
        ("elevation", "right"),
        ("footprint", "right"),
        ("geometric", "right"),
        ("total loss", "right"),
        ("QBER", "right"),
        ("key rate", "right"),
        ("PLOB bound", "right"),
        ("per day", "right"),
    )
    for name, justify in columns:
        table.add_column(name, justify=justify)  # type: ignore[arg-type]
    for row in answer["links"]:
        if not row["planned"]:
            table.add_row(row["link_id"], "not planned: " + "; ".join(row["missing"]))
            continue
        qber = row["qber"]
        spread = row["daily_secret_bits_sd"] or 0.0
        table.add_row(
            row["link_id"],
            row["protocol"],
            _si(row["slant_range_m"], "m"),
            _num(row["elevation_deg"], ".1f") + " deg",
            _si(row["footprint_diameter_m"], "m"),
            _num(row["geometric_loss_db"], ".1f") + " dB",
            _num(row["total_loss_db"], ".1f") + " dB",
            "-" if qber is None else f"{100 * qber:.2f} %",
            _si(row["secret_key_rate_bps"], "bit/s"),
            _si(row["plob_bound_bps"], "bit/s"),
            f"{_si(row['daily_secret_bits'], 'bit')} ± {_si(spread, 'bit')}",
        )
    return table


def pairs_table(answer: dict[str, Any]) -> Table:
    table = Table(title=f"pairs planned at {answer['node_id']} for {answer['day']} (UTC)")
    for name in (
        "pair",
        "supply per day",
        "demand per day",
        "surplus",
        "until empty",
        "buffer for a spell",
    ):
        table.add_column(name, justify="left" if name == "pair" else "right")
    for row in answer["pairs"]:
        if not row["planned"]:
            table.add_row(row["pair_id"], "not planned: " + "; ".join(row["missing"]))
            continue
        demand = row["daily_demand_bits"]
        source = f" ({row['demand_source']})" if row["demand_source"] else ""
        table.add_row(
            row["pair_id"],
            _si(row["daily_supply_bits"], "bit"),
            ("-" if demand is None else _si(demand, "bit")) + source,
            _si(row["daily_surplus_bits"], "bit"),
            "never"
            if row["time_until_empty_s"] is None
            and demand is not None
            and row["ready_bits"] is not None
            else _duration(row["time_until_empty_s"]),
            _si(row["buffer_bits_needed"], "bit"),
        )
    return table


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
