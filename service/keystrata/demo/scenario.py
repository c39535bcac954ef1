"""The demo's invented scenario.

Lowmarch is an invented coastal region. Its invented operator, the Lowmarch Quantum
Grid, flies the airship *Vela* at about 20 km as a trusted relay over three ground
stations: the harbour at Karsvik, the data centre at Tollmere and the records office at
Brenhaven. Every name and person here is made up, and so are the coordinates.

The network is described by optics (keystrata_physics): the airship's position and
altitude, each station's position, telescope and sky, one link profile. The link
emulator and the nodes' plans both run on it, so every rate the demo shows comes from
the link model and sits under the PLOB bound for the stated 20 MHz pulse clock: about
320, 170 and 70 kbit/s on a clear night, about half, a third and a seventh of that at
midsummer noon.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

ORGANISATION = "Lowmarch Quantum Grid"
CA_NAME = "Lowmarch Quantum Grid Demo CA"
RELAY = "relay-vela"


#: The airship's station-keeping circle (invented coordinates): 20 km up, within 3 km.
PLATFORM: dict[str, Any] = {
    "latitude_deg": 61.20,
    "longitude_deg": -3.50,
    "altitude_m": 20_000.0,
    "station_keeping_radius_m": 3_000.0,
}

#: What every demo link shares: decoy BB84 at a 20 MHz pulse clock, 850 nm, a 15 urad
#: beam; a 0.5 nm filter and a 40 urad field of view, so daylight costs key.
OPTICS: dict[str, Any] = {
    "protocol": "decoy-bb84",
    "clock_hz": 2.0e7,
    "wavelength_nm": 850.0,
    "divergence_urad": 15.0,
    "pointing_jitter_urad": 1.0,
    "filter_nm": 0.5,
    "fov_urad": 40.0,
    "gate_ns": 1.0,
}


@dataclass(frozen=True)
class Station:
    node_id: str
    place: str
    link_id: str
    module: str  # certificate name of the QKD module pair of its link
    latitude_deg: float
    longitude_deg: float
    height_m: float
    rx_aperture_m: float  # the receiving telescope's diameter
    clear_sky: float  # chance of a clear line of sight, any month and hour
    mean_cloud_spell_s: float
    saes: tuple[str, ...]

    @property
    def optics(self) -> dict[str, Any]:
        """The link's optical profile (registry ``optics``, emulator ``[link.optics]``)."""
        return OPTICS | {"rx_aperture_m": self.rx_aperture_m}

    @property
    def physical(self) -> dict[str, Any]:
        """The station's site and sky (registry ``physical``, emulator ``[link.station]``)."""
        return {
            "latitude_deg": self.latitude_deg,
            "longitude_deg": self.longitude_deg,
            "height_m": self.height_m,
            "clear_sky": self.clear_sky,
            "mean_cloud_spell_s": self.mean_cloud_spell_s,
        }


STATIONS = (
    Station(
        "karsvik",
        "Karsvik harbour",
        "link-karsvik",
        "qkd-karsvik",
        61.30,
        -3.62,
        15.0,
        0.5,
        1.0,  # a dry harbour: the demo keeps it clear
        0.0,
        ("enc-karsvik-1", "enc-karsvik-2"),
    ),
    Station(
        "tollmere",
        "Tollmere data centre",
        "link-tollmere",
        "qkd-tollmere",
        61.05,
        -3.30,
        60.0,
        0.4,
        0.9,
        1800.0,
        ("enc-tollmere-1", "enc-tollmere-2"),
    ),
    Station(
        "brenhaven",
        "Brenhaven records office",
        "link-brenhaven",
        "qkd-brenhaven",
        61.32,
        -3.05,
        110.0,
        0.3,
        0.5,
        7200.0,
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
