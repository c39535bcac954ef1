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
    from rich import box
    from rich.table import Table

    def table(title: str, *columns: tuple[str, str]) -> Table:
        # No vertical rules and no cell ever wrapped or cut: with IDs of up to about
        # 24 characters the tables fit 80 columns (a narrower terminal drops the
        # planned rate, which "of plan" still shows as a share); headers wrap.
        out = Table(title=title, title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False)
        for name, justify in columns:
            out.add_column(name, justify=justify, no_wrap=True, min_width=len(name))  # type: ignore[arg-type]
        return out

    wide = console.width >= 96

    units = Units(exact=exact)
    amount, rate = units.bits, units.rate

    nodes = table(
        f"{name}: nodes",
        ("Node", "left"),
        ("Role", "left"),
        ("Up", "left"),
        ("Version", "left"),
        ("Alerts", "right"),
    )
    for s in statuses:
        up = "[green]yes[/green]" if s.up and not s.error else "[red]no[/red]"
        nodes.add_row(s.node_id, s.role, up, s.version or "-", str(len(s.alerts)))
    console.print(nodes)

    links_table = table(
        "QKD links (received at the station over its rate window)",
        ("Link", "left"),
        ("Received", "right"),
        ("QBER", "right"),
        *([("Planned", "right")] if wide else []),
        ("Of plan", "right"),
        ("Relay pool", "right"),
        ("Station pool", "right"),
    )
    for r in links:
        links_table.add_row(
            r.link_id,
            rate(r.rate_bps),
            "-" if r.qber is None else f"{100 * r.qber:.1f} %",
            *([rate(r.planned_bps)] if wide else []),
            units.share(r.plan_ratio),
            amount(r.relay_pool_bits),
            amount(r.station_pool_bits),
        )
    console.print(links_table)

    pairs_table = table(
        "Pairs (ready at the first / second station; keys handed out)",
        ("Pair", "left"),
        ("Ready", "right"),
        ("Target", "right"),
        ("Lasts", "right"),
        ("Keys", "right"),
    )
    for p in pairs:
        pairs_table.add_row(
            p.pair_id,
            " / ".join(amount(b) for b in p.ready_bits),
            amount(p.target_bits),
            units.duration(p.time_until_empty_s),
            units.count(p.keys_delivered),
        )
    console.print(pairs_table)

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
