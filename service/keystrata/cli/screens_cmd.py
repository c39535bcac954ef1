"""`keystrata pools`, `pairs` and `deliveries`: what a running node holds, as tables
(figures in the units of :mod:`keystrata.cli.units`) or JSON, once or every few seconds."""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import click
from rich import box
from rich.console import Console, ConsoleOptions, Group, RenderResult
from rich.live import Live
from rich.table import Table

from keystrata.cli import render
from keystrata.cli.common import console, print_json
from keystrata.cli.connection import connection_options, operator, require_role
from keystrata.cli.units import HUMAN, Units

watch_opt = click.option(
    "--watch",
    type=click.FloatRange(min=0.2),
    default=None,
    metavar="SECONDS",
    help="Refresh the table every SECONDS until Ctrl-C.",
)


def _show(
    fetch: Callable[[], dict[str, Any]],
    table: Callable[[dict[str, Any]], Any],
    *,
    watch: float | None,
    as_json: bool,
) -> None:
    """Print one answer as JSON or a table, or refresh the table every ``watch`` seconds
    until interrupted."""
    if as_json:
        print_json(fetch())
    elif watch is None:
        console.print(table(fetch()))
    else:
        try:
            with Live(table(fetch()), console=console) as live:
                while True:
                    time.sleep(watch)
                    live.update(table(fetch()))
        except KeyboardInterrupt:
            pass


class Sheet:
    """A table that fits the terminal: one row per item when that fits, else turned
    (one column per item, one line per figure), never cut words."""

    def __init__(self, title: str, columns: tuple[str, ...], left: int = 1) -> None:
        self.title, self.columns, self.left = title, columns, left
        self.rows: list[tuple[str, ...]] = []

    def add_row(self, *cells: str) -> None:
        self.rows.append(cells)

    def wide(self) -> Table:
        table = Table(title=self.title, box=box.SIMPLE_HEAD, pad_edge=False)
        for i, col in enumerate(self.columns):
            table.add_column(col, justify="left" if i < self.left else "right", no_wrap=True)
        for row in self.rows:
            table.add_row(*row)
        return table

    def turned(self) -> Table:
        table = Table(title=self.title, box=box.SIMPLE_HEAD, pad_edge=False)
        table.add_column("", no_wrap=True)
        for row in self.rows:
            table.add_column("\n".join(c for c in row[: self.left] if c), justify="right")
        for i, name in enumerate(self.columns[self.left :], start=self.left):
            table.add_row(name, *(row[i] for row in self.rows))
        return table

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        wide = self.wide()
        unbounded = options.update_width(100_000)
        if not self.rows or console.measure(wide, options=unbounded).maximum <= options.max_width:
            yield wide
        else:
            yield self.turned()


def pools_table(answer: dict[str, Any], units: Units = HUMAN) -> Sheet:
    table = Sheet(
        f"link key pools at {answer['node_id']}",
        ("link", "peer", "available", "used", "rate", "plan", "of plan", "last block"),
        left=2,
    )
    for p in answer["pools"]:
        table.add_row(
            p["link_id"],
            p["peer_node_id"],
            units.bits(p["bits_available"]),
            units.bits(p["bits_used"]),
            units.rate(p["rate_bps"]),
            units.rate(p.get("planned_rate_bps")),
            units.share(p.get("plan_ratio")),
            render.age(p["last_block_at"]),
        )
    return table


@click.command("pools")
@watch_opt
@connection_options
def pools(
    watch: float | None, url: str, ca: Path, cert: Path, key: Path, as_json: bool, exact: bool
) -> None:
    """Show the link key pool of every QKD link ending at the node (relay or station)."""
    units = Units(exact)
    with operator(url, ca, cert, key) as client:
        _show(client.pools, lambda a: pools_table(a, units), watch=watch, as_json=as_json)


def pairs_table(answer: dict[str, Any], units: Units = HUMAN) -> Group:
    """The pair buffers a node reports (relay and station views differ): at a relay
    each station's side, then each pair's relaying."""
    title = f"pair key at {answer['node_id']} ({answer['role']})"
    if answer["role"] == "relay":
        sides = Sheet(title, ("pair", "station", "ready", "owned", "pending"), left=2)
        relaying = Sheet("relaying", ("pair", "on its way", "relay rate", "target", "until empty"))
        for p in answer["pairs"]:
            for i, side in enumerate(p["sides"]):
                sides.add_row(
                    "" if i else p["pair_id"],
                    side["station"],
                    units.bits(side["ready_bits"]),
                    units.bits(side["owned_ready_bits"]),
                    units.bits(side["pending_bits"]),
                )
            relaying.add_row(
                p["pair_id"],
                units.bits(p["in_flight_bits"]),
                units.rate(p["relay_rate_bps"]),
                units.bits(p["target_bits"]),
                units.duration(p["time_until_empty_s"]),
            )
        return Group(sides, relaying)
    table = Sheet(title, ("pair", "partner", "ready", "owned here", "partner's", "pending"), left=2)
    for p in answer["pairs"]:
        table.add_row(
            p["pair_id"],
            p["partner"],
            units.bits(p["ready_bits"]),
            units.bits(p["owned_ready_bits"]),
            units.bits(p["partner_owned_ready_bits"]),
            units.bits(p["pending_bits"]),
        )
    return Group(table)


@click.command("pairs")
@watch_opt
@connection_options
def pairs(
    watch: float | None, url: str, ca: Path, cert: Path, key: Path, as_json: bool, exact: bool
) -> None:
    """Show pair key buffers: at a relay both stations' buffers, relay rate, target and
    time until empty; at a station its ready key per pair by owner."""
    units = Units(exact)
    with operator(url, ca, cert, key) as client:
        _show(client.pairs, lambda a: pairs_table(a, units), watch=watch, as_json=as_json)


def deliveries_tables(answer: dict[str, Any], units: Units = HUMAN) -> Group:
    """Key delivery accounting of a station: one table per pair, one per SAE."""

    def cell(counts: dict[str, int]) -> str:
        return units.keys_and_bits(counts).replace(" (", "\n(", 1)

    pairs = Sheet(
        f"key delivery at {answer['node_id']}: pairs",
        ("pair", "to masters", "to slaves", "waiting", "expired"),
    )
    for p in answer["pairs"]:
        pairs.add_row(
            p["pair_id"], cell(p["to_masters"]), cell(p["to_slaves"]), cell(p["waiting"]),
            cell(p["expired"]),
        )  # fmt: skip
    saes = Sheet("SAEs", ("SAE", "as master", "as slave", "expired", "refused requests"))
    for s in answer["saes"]:
        saes.add_row(
            s["sae_id"], cell(s["as_master"]), cell(s["as_slave"]), cell(s["expired"]),
            units.count(s["refused"]),
        )  # fmt: skip
    return Group(pairs, saes)


@click.command("deliveries")
@connection_options
def deliveries(url: str, ca: Path, cert: Path, key: Path, as_json: bool, exact: bool) -> None:
    """Show key delivery accounting at a station, per pair and per SAE: keys and bits
    to masters, to slaves, waiting and expired, and refused requests."""
    with operator(url, ca, cert, key) as client:
        require_role(client, "station", "deliveries")
        answer = client.deliveries()
    if as_json:
        print_json(answer)
    else:
        console.print(deliveries_tables(answer, Units(exact)))
