"""What the demo shows: link key pools at both ends of every QKD link."""

from __future__ import annotations

from dataclasses import dataclass, field
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
    #: The relay's view of every pair, and each station's own view.
    relay_pairs: list[dict[str, Any]] = field(default_factory=list)
    station_pairs: dict[str, list[dict[str, Any]]] = field(default_factory=dict)


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
        ("received alike", "left"),
        ("blocks", "right"),
        ("errors", "right"),
    ):
        table.add_column(col, justify=just, no_wrap=True)  # type: ignore[arg-type]
    for st in scenario.STATIONS:
        link = stats.get(st.link_id)
        relay_pool = snap.pools.get((scenario.RELAY, st.link_id), {})
        station_pool = snap.pools.get((st.node_id, st.link_id), {})
        relay, station = relay_pool.get("bits_available"), station_pool.get("bits_available")
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
        # Both ends must have received the same link key (what is left differs while
        # relay messages are on their way).
        got = (relay_pool.get("bits_received"), station_pool.get("bits_received"))
        agree = "-" if None in got else ("yes" if got[0] == got[1] else "catching up")
        table.add_row(
            st.link_id, st.place, sky, rate, _bits(relay), _bits(station), agree, blocks, errors
        )
    return table


def pairs_table(
    relay_pairs: list[dict[str, Any]], station_pairs: dict[str, list[dict[str, Any]]]
) -> Table:
    """Pair key buffers: ready key at each station (and how much of it each owns)."""
    table = Table(
        title="pair key (ready at each station; owned share in brackets)", title_justify="left"
    )
    for col, just in (
        ("pair", "left"),
        ("first station", "right"),
        ("second station", "right"),
        ("on its way", "right"),
        ("relay rate", "right"),
        ("target", "right"),
    ):
        table.add_column(col, justify=just, no_wrap=True)  # type: ignore[arg-type]
    for pair in relay_pairs:
        cells = []
        for station in pair["stations"]:
            mine = next(
                (p for p in station_pairs.get(station, []) if p["pair_id"] == pair["pair_id"]), None
            )
            cells.append(
                "-"
                if mine is None
                else f"{station}: {_bits(mine['ready_bits'])} ({_bits(mine['owned_ready_bits'])})"
            )
        table.add_row(
            pair["pair_id"],
            *cells,
            _bits(pair["in_flight_bits"]),
            f"{_bits(int(pair['relay_rate_bps']))}/s",
            _bits(pair["target_bits"]),
        )
    return table


def encryptors_table(stats: dict[str, Any]) -> Table:
    """Emulated encryptor pairs rekeying: keys delivered, matches and failures."""
    table = Table(title="encryptor pairs rekeying (ETSI GS QKD 014)", title_justify="left")
    for col in (
        "encryptors",
        "rekeys",
        "keys delivered",
        "bits",
        "match",
        "mismatch",
        "waiting for key",
        "errors",
    ):
        table.add_column(col, justify="left" if col == "encryptors" else "right", no_wrap=True)
    for name, st in sorted(stats.items()):
        table.add_row(
            name,
            f"{st.rekeys_attempted:,}",
            f"{st.keys_delivered:,}",
            _bits(st.bits_delivered),
            f"{st.matches:,}",
            f"{st.mismatches:,}",
            f"{st.waiting:,}",
            f"{sum(st.errors.values()):,}",
        )
    return table
