"""The screen of `keystrata network status`: nodes, links, pairs and alerts, each a
table narrow enough for an 80-column terminal."""

from __future__ import annotations

from typing import TYPE_CHECKING

from keystrata.cli.units import Units
from keystrata_client.network.status import LinkRow, NodeStatus, PairRow

if TYPE_CHECKING:
    from rich.console import Console


def render(
    console: Console,
    name: str,
    statuses: list[NodeStatus],
    links: list[LinkRow],
    pairs: list[PairRow],
    *,
    exact: bool = False,
) -> None:
    from rich.table import Table

    units = Units(exact=exact)
    amount, rate = units.bits, units.rate

    nodes = Table(title=f"{name}: nodes", title_justify="left")
    for col in ("Node", "Role", "Up", "Version", "Alerts"):
        nodes.add_column(col)
    for s in statuses:
        up = "[green]yes[/green]" if s.up and not s.error else "[red]no[/red]"
        nodes.add_row(s.node_id, s.role, up, s.version or "-", str(len(s.alerts)))
    console.print(nodes)

    table = Table(title="QKD links", title_justify="left")
    for col, justify in (
        ("Link", "left"),
        ("Received", "right"),
        ("QBER", "right"),
        ("Plan (share)", "right"),
        ("Relay pool", "right"),
        ("Station pool", "right"),
    ):
        table.add_column(col, justify=justify)  # type: ignore[arg-type]
    for r in links:
        table.add_row(
            r.link_id,
            rate(r.rate_bps),
            "-" if r.qber is None else f"{100 * r.qber:.1f} %",
            rate(r.planned_bps)
            + ("" if r.plan_ratio is None else f" ({units.share(r.plan_ratio)})"),
            amount(r.relay_pool_bits),
            amount(r.station_pool_bits),
        )
    console.print(table)

    table = Table(title="Pairs (ready key as each station reports it)", title_justify="left")
    for col, justify in (
        ("Pair", "left"),
        ("Ready", "right"),
        ("Target", "right"),
        ("Lasts", "right"),
        ("Keys out", "right"),
    ):
        table.add_column(col, justify=justify)  # type: ignore[arg-type]
    for p in pairs:
        ready = " / ".join(
            f"{st} {amount(b)}" for st, b in zip(p.stations, p.ready_bits, strict=True)
        )
        table.add_row(
            p.pair_id,
            ready,
            amount(p.target_bits),
            units.duration(p.time_until_empty_s),
            units.count(p.keys_delivered),
        )
    console.print(table)

    alerts = [(s.node_id, a) for s in statuses for a in s.alerts]
    down = [(s.node_id, s.error) for s in statuses if s.error]
    if not alerts and not down:
        console.print("Alerts: none")
        return
    console.print("Alerts:")
    for node_id, error in down:
        console.print(f"  [red]{node_id}[/red]: {error}", highlight=False)
    for node_id, alert in alerts:
        console.print(f"  [yellow]{node_id}[/yellow]: {alert}", highlight=False)
