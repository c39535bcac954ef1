"""The screen of `keystrata network status`: nodes, links, pairs and alerts, each a
table narrow enough for an 80-column terminal."""

from __future__ import annotations

from typing import TYPE_CHECKING

from keystrata_client.network.status import LinkRow, NodeStatus, PairRow

if TYPE_CHECKING:
    from rich.console import Console


def bits(value: float) -> str:
    for unit, size in (("Gbit", 1e9), ("Mbit", 1e6), ("kbit", 1e3)):
        if abs(value) >= size:
            return f"{value / size:.3g} {unit}"
    return f"{value:.0f} bit"


def rate(value: float | None) -> str:
    return "-" if value is None else bits(value) + "/s"


def ratio(value: float | None) -> str:
    return "-" if value is None else f"{100 * value:.0f} %"


def duration(seconds: float | None) -> str:
    if seconds is None:
        return "-"
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    if seconds < 172_800:
        return f"{seconds / 3600:.1f} h"
    return f"{seconds / 86400:.1f} d"


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

    def amount(value: int | None) -> str:
        return "-" if value is None else (f"{value} bit" if exact else bits(value))

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
            rate(r.planned_bps) + ("" if r.plan_ratio is None else f" ({ratio(r.plan_ratio)})"),
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
            duration(p.time_until_empty_s),
            "-" if p.keys_delivered is None else f"{p.keys_delivered:,}",
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
