"""The demo's invented scenario.

Lowmarch is an invented coastal region. Its invented operator, the Lowmarch Quantum
Grid, flies the airship *Vela* at about 20 km as a trusted relay over three ground
stations: the harbour at Karsvik, the data centre at Tollmere and the records office at
Brenhaven. Every name and person here is made up.
"""

from __future__ import annotations

from dataclasses import dataclass

ORGANISATION = "Lowmarch Quantum Grid"
CA_NAME = "Lowmarch Quantum Grid Demo CA"
RELAY = "relay-vela"


@dataclass(frozen=True)
class Station:
    node_id: str
    place: str
    link_id: str
    module: str  # certificate name of the QKD module pair of its link
    base_rate_bps: float  # secret key rate of its link at night in clear sky
    mean_clear_s: float
    mean_cloud_s: float
    saes: tuple[str, ...]


STATIONS = (
    Station(
        "karsvik",
        "Karsvik harbour",
        "link-karsvik",
        "qkd-karsvik",
        240_000.0,
        6 * 3600,
        0.0,
        ("enc-karsvik-1", "enc-karsvik-2"),
    ),
    Station(
        "tollmere",
        "Tollmere data centre",
        "link-tollmere",
        "qkd-tollmere",
        160_000.0,
        5 * 3600,
        1800.0,
        ("enc-tollmere-1", "enc-tollmere-2"),
    ),
    Station(
        "brenhaven",
        "Brenhaven records office",
        "link-brenhaven",
        "qkd-brenhaven",
        120_000.0,
        2 * 3600,
        2 * 3600.0,
        ("enc-brenhaven-1", "enc-brenhaven-2"),
    ),
)

#: Station pairs that share end-to-end key through the relay.
PAIRS = (("karsvik", "tollmere"), ("brenhaven", "karsvik"), ("brenhaven", "tollmere"))

OPERATOR = "ops-ida-varga"  # Ida Varga, network operator (invented)
AUDITOR = "audit-marek-olwen"  # Marek Olwen, auditor (invented)


def pair_id(a: str, b: str) -> str:
    first, second = sorted((a, b))
    return f"pair-{first}-{second}"


def station(node_id: str) -> Station:
    return next(s for s in STATIONS if s.node_id == node_id)


def partners(node_id: str) -> list[str]:
    """Stations paired with ``node_id``."""
    return sorted({b if a == node_id else a for a, b in PAIRS if node_id in (a, b)})
