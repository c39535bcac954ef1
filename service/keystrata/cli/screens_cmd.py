"""`keystrata pools`, `pairs` and `deliveries`: what a running node holds, as tables
(figures in the units of :mod:`keystrata.cli.units`) or JSON, once or every few seconds."""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import click
from rich import box
from rich.console import Group
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


def _table(title: str, columns: tuple[str, ...], left: int = 1) -> Table:
    table = Table(title=title, box=box.SIMPLE_HEAD, pad_edge=False)
    for i, col in enumerate(columns):
        table.add_column(col, justify="left" if i < left else "right", no_wrap=i >= left)
    return table


def pools_table(answer: dict[str, Any], units: Units = HUMAN) -> Table:
    table = _table(
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


def pairs_table(answer: dict[str, Any], units: Units = HUMAN) -> Table:
    """The pair buffers a node reports, as a table (relay and station views differ)."""
    title = f"pair key at {answer['node_id']} ({answer['role']})"
    if answer["role"] == "relay":
        table = _table(
            title,
            ("pair", "station", "ready", "owned", "pending", "on its way", "relay rate",
             "target", "until empty"),
            left=2,
        )  # fmt: skip
        for p in answer["pairs"]:
            for i, side in enumerate(p["sides"]):
                first = i == 0
                table.add_row(
                    p["pair_id"] if first else "",
                    side["station"],
                    units.bits(side["ready_bits"]),
                    units.bits(side["owned_ready_bits"]),
                    units.bits(side["pending_bits"]),
                    units.bits(p["in_flight_bits"]) if first else "",
                    units.rate(p["relay_rate_bps"]) if first else "",
                    units.bits(p["target_bits"]) if first else "",
                    units.duration(p["time_until_empty_s"]) if first else "",
                )
        return table
    table = _table(
        title,
        ("pair", "partner", "ready", "owned here", "owned by partner", "pending"),
        left=2,
    )
    for p in answer["pairs"]:
        table.add_row(
            p["pair_id"],
            p["partner"],
            units.bits(p["ready_bits"]),
            units.bits(p["owned_ready_bits"]),
            units.bits(p["partner_owned_ready_bits"]),
            units.bits(p["pending_bits"]),
        )
    return table


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
    cell = units.keys_and_bits
    pairs = _table(
        f"key delivery at {answer['node_id']}: pairs",
        ("pair", "to masters", "to slaves", "waiting", "expired"),
    )
    for p in answer["pairs"]:
        pairs.add_row(
            p["pair_id"], cell(p["to_masters"]), cell(p["to_slaves"]), cell(p["waiting"]),
            cell(p["expired"]),
        )  # fmt: skip
    saes = _table("SAEs", ("SAE", "as master", "as slave", "expired", "refused requests"))
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
