"""What the demo shows, in the order key flows: link key pools at both ends of every QKD
link, pair key at both stations of every pair, and the encryptor pairs using it. The
tables are sheets (``layout.py``) fitted to the terminal at every render."""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field
from typing import Any

from keystrata.demo import scenario
from keystrata.demo.layout import Column, Screen, Sheet
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


def _sky(link: LinkStats) -> tuple[str, str]:
    """The sky over the station: in full (weather, daylight and the sun's elevation),
    and short (weather and daylight)."""
    if link.sun_elevation_deg is None:
        return str(link.weather), str(link.weather)
    if not link.on_station:
        return f"{link.weather}, off station", "off station"
    sun = link.sun_elevation_deg
    light = "night" if sun < -6 else ("twilight" if sun < 6 else "day")
    return f"{link.weather}, {light} {sun:+.0f} deg", f"{link.weather}, {light}"


#: The links sheet's columns; a higher ``drop`` leaves first on a narrow terminal.
LINK_COLUMNS = (
    Column("QKD link", "left"),
    Column("sky", "left", drop=2),
    Column("planned", drop=1),
    Column("QBER", drop=5),
    Column("observed"),
    Column("of plan", drop=3),
    Column("relay pool", drop=4),
    Column("station pool", drop=1),
    Column("alike", "left", drop=4),
    Column("errors", drop=4),
)


def links_sheet(snap: Snapshot, stats: dict[str, LinkStats], observed: ObservedRates) -> Sheet:
    """Per QKD link: the sky, the link model's clear-sky rate and QBER for the emulated
    moment (planned), what the stations received over the last seconds (observed), and
    the pools at both ends."""
    sheet = Sheet("QKD links: link key pools at both ends", LINK_COLUMNS)
    for st in scenario.STATIONS:
        link = stats.get(st.link_id)
        relay_pool = snap.pools.get((scenario.RELAY, st.link_id), {})
        station_pool = snap.pools.get((st.node_id, st.link_id), {})
        relay, station = relay_pool.get("bits_available"), station_pool.get("bits_available")
        seen = observed.rate_bps(st.link_id)
        sky: tuple[str, str] | str
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
        sheet.rows.append(
            (
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
        )
    return sheet


PAIR_COLUMNS = (
    Column("pair", "left"),
    Column("first", drop=0),
    Column("owns", drop=3),
    Column("second", drop=0),
    Column("owns", drop=3),
    Column("on its way", drop=2),
    Column("relay rate", drop=1),
    Column("target", drop=1),
)


def pairs_sheet(
    relay_pairs: list[dict[str, Any]], station_pairs: dict[str, list[dict[str, Any]]]
) -> Sheet:
    """Pair key buffers: ready key at each station (first and second as in the pair's
    name), how much of it each owns, key on its way, the relay's rate and the target."""
    sheet = Sheet("pair key: ready at the first and the second station", PAIR_COLUMNS)
    for pair in relay_pairs:
        cells: list[str] = []
        for station in sorted(pair["stations"]):
            mine = next(
                (p for p in station_pairs.get(station, []) if p["pair_id"] == pair["pair_id"]), None
            )
            if mine is None:
                cells += ["-", "-"]
            else:
                cells += [_bits(mine["ready_bits"]), _bits(mine["owned_ready_bits"])]
        sheet.rows.append(
            (
                pair["pair_id"].removeprefix("pair-"),
                *cells,
                _bits(pair["in_flight_bits"]),
                f"{_bits(int(pair['relay_rate_bps']))}/s",
                _bits(pair["target_bits"]),
            )
        )
    return sheet


def _short_pair_name(name: str) -> str:
    """ "enc-a-1 -> enc-b-1" as "a-1 -> b-1": the SAE IDs without their common prefix."""
    return " -> ".join(part.removeprefix("enc-") for part in name.split(" -> "))


ENCRYPTOR_COLUMNS = (
    Column("encryptors", "left"),
    Column("rekeys", drop=2),
    Column("keys delivered"),
    Column("bits", drop=3),
    Column("match", drop=2),
    Column("mismatch"),
    Column("times waited for key", drop=1),
    Column("failures"),
)


def encryptors_sheet(stats: dict[str, Any]) -> Sheet:
    """Emulated encryptor pairs rekeying: keys delivered, matches and failures."""
    sheet = Sheet("encryptor pairs rekeying (ETSI GS QKD 014)", ENCRYPTOR_COLUMNS)
    for name, st in sorted(stats.items()):
        sheet.rows.append(
            (
                (name, _short_pair_name(name)),
                f"{st.rekeys_attempted:,}",
                f"{st.keys_delivered:,}",
                _bits(st.bits_delivered),
                f"{st.matches:,}",
                f"{st.mismatches:,}",
                f"{st.times_waited_for_key:,}",
                f"{sum(st.errors.values()):,}",
            )
        )
    return sheet


def screen(
    headline: str,
    snap: Snapshot,
    stats: dict[str, LinkStats],
    encryptors: dict[str, Any],
    observed: ObservedRates,
) -> Screen:
    """The demo's screen: link pools, pair key, encryptors, under ``headline``."""
    return Screen(
        headline,
        [
            links_sheet(snap, stats, observed),
            pairs_sheet(snap.relay_pairs, snap.station_pairs),
            encryptors_sheet(encryptors),
        ],
    )
