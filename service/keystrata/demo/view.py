"""What the demo shows: link key pools at both ends of every QKD link."""

from __future__ import annotations

from collections import deque
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


class ObservedRates:
    """Link key rates as the stations received them: the change of each station's
    ``bits_received`` over the last few snapshots (about five seconds)."""

    def __init__(self, keep: int = 6) -> None:
        self._seen: deque[tuple[float, dict[str, int]]] = deque(maxlen=keep)

    def add(self, snap: Snapshot) -> None:
        got = {
            st.link_id: int(pool["bits_received"])
            for st in scenario.STATIONS
            if (pool := snap.pools.get((st.node_id, st.link_id))) is not None
        }
        self._seen.append((snap.elapsed, got))

    def rate_bps(self, link_id: str) -> float | None:
        if len(self._seen) < 2:
            return None
        (t0, first), (t1, last) = self._seen[0], self._seen[-1]
        if t1 <= t0 or link_id not in first or link_id not in last:
            return None
        return (last[link_id] - first[link_id]) / (t1 - t0)


def _sky(link: LinkStats) -> str:
    if link.sun_elevation_deg is None:
        return str(link.weather)
    sun = link.sun_elevation_deg
    light = "night" if sun < -6 else ("twilight" if sun < 6 else "day")
    where = "" if link.on_station else ", off station"
    return f"{link.weather}, {light} {sun:+.0f} deg{where}"


def links_table(
    snap: Snapshot, stats: dict[str, LinkStats], title: str, observed: ObservedRates
) -> Table:
    """Per QKD link: the sky, the link model's clear-sky rate and QBER for the emulated
    moment (planned), what the stations received over the last seconds (observed), and
    the pools at both ends."""
    table = Table(title=title, title_justify="left")
    for col, just in (
        ("QKD link", "left"),
        ("sky", "left"),
        ("planned", "right"),
        ("QBER", "right"),
        ("observed", "right"),
        ("of plan", "right"),
        ("relay pool", "right"),
        ("station pool", "right"),
        ("alike", "left"),
        ("errors", "right"),
    ):
        table.add_column(col, justify=just, no_wrap=True)  # type: ignore[arg-type]
    for st in scenario.STATIONS:
        link = stats.get(st.link_id)
        relay_pool = snap.pools.get((scenario.RELAY, st.link_id), {})
        station_pool = snap.pools.get((st.node_id, st.link_id), {})
        relay, station = relay_pool.get("bits_available"), station_pool.get("bits_available")
        seen = observed.rate_bps(st.link_id)
        if link is None:
            sky, planned, qber, share, errors = "-", "-", "-", "-", "-"
        else:
            sky = _sky(link)
            planned = f"{_bits(int(link.planned_rate_bps))}/s"
            qber = "-" if link.planned_qber is None else f"{100 * link.planned_qber:.1f} %"
            share = (
                f"{100 * seen / link.planned_rate_bps:.0f} %"
                if seen is not None and link.planned_rate_bps > 0
                else "-"
            )
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
            st.link_id.removeprefix("link-"),
            sky,
            planned,
            qber,
            "-" if seen is None else f"{_bits(int(seen))}/s",
            share,
            _bits(relay),
            _bits(station),
            agree,
            errors,
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
