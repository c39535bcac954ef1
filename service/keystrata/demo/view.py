"""What the demo shows: link key pools at both ends of every QKD link."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from rich.table import Table

from keystrata.demo import scenario
from keystrata_client.emulators import LinkStats


@dataclass
class Snapshot:
    """Pool levels read from the nodes: (node, link) -> pool object."""

    pools: dict[tuple[str, str], dict[str, Any]]
    elapsed: float
    dead: list[str]


def _bits(n: int | None) -> str:
    if n is None:
        return "-"
    for unit, size in (("Mbit", 1_000_000), ("kbit", 1_000)):
        if n >= size:
            return f"{n / size:,.1f} {unit}"
    return f"{n} bit"


def links_table(snap: Snapshot, stats: dict[str, LinkStats], title: str) -> Table:
    table = Table(title=title, title_justify="left")
    for col, just in (
        ("QKD link", "left"),
        ("station", "left"),
        ("sky", "left"),
        ("key rate", "right"),
        ("relay pool", "right"),
        ("station pool", "right"),
        ("ends agree", "left"),
        ("blocks", "right"),
        ("errors", "right"),
    ):
        table.add_column(col, justify=just, no_wrap=True)  # type: ignore[arg-type]
    for st in scenario.STATIONS:
        link = stats.get(st.link_id)
        relay = snap.pools.get((scenario.RELAY, st.link_id), {}).get("bits_available")
        station = snap.pools.get((st.node_id, st.link_id), {}).get("bits_available")
        if link is None:
            sky, rate, blocks, errors = "-", "-", "-", "-"
        else:
            night = "night" if link.daylight > 0.5 else "day"
            sky = f"{link.weather}, {night}"
            rate = f"{_bits(int(link.rate_bps))}/s"
            blocks = f"{link.blocks_generated:,}"
            errors = str(
                link.relay.errors
                + link.station.errors
                + link.relay.rejected
                + link.station.rejected
            )
        agree = (
            "-"
            if relay is None or station is None
            else ("yes" if relay == station else "catching up")
        )
        table.add_row(
            st.link_id, st.place, sky, rate, _bits(relay), _bits(station), agree, blocks, errors
        )
    return table
