"""The physical profiles of the registry as the link model's records.

A link can be planned when its optics, its relay's platform and its station's sky are
all in the registry; :func:`link_profiles` says which part is missing otherwise.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TypeVar

from sqlalchemy import select
from sqlalchemy.orm import Session

from keystrata.storage.models import QkdLink, RegistryNode
from keystrata_physics.optics import LinkOptics, Platform, StationSky, from_mapping

_T = TypeVar("_T", LinkOptics, Platform, StationSky)


@dataclass(frozen=True, slots=True)
class LinkProfile:
    """One active link with whatever profile the registry holds for it.

    Attributes:
        link_id, relay_id, station_id: the registry entry.
        optics, platform, sky: the model's records (``None`` where not provisioned).
    """

    link_id: str
    relay_id: str
    station_id: str
    optics: LinkOptics | None
    platform: Platform | None
    sky: StationSky | None

    @property
    def missing(self) -> list[str]:
        """What the registry lacks to plan this link, as field paths."""
        out = []
        if self.optics is None:
            out.append(f"links/{self.link_id}: optics")
        if self.platform is None:
            out.append(f"nodes/{self.relay_id}: physical")
        if self.sky is None:
            out.append(f"nodes/{self.station_id}: physical")
        return out


def link_profiles(s: Session) -> list[LinkProfile]:
    """Every active link of the registry with its profiles, by link ID.

    Profiles were checked when they were written; one that no longer passes (a model
    whose rules changed) counts as missing rather than failing the whole plan.
    """
    nodes = {
        n.node_id: n
        for n in s.execute(select(RegistryNode).where(RegistryNode.retired_at.is_(None))).scalars()
    }
    links = s.execute(
        select(QkdLink).where(QkdLink.retired_at.is_(None)).order_by(QkdLink.link_id)
    ).scalars()
    out = []
    for link in links:
        relay, station = nodes.get(link.relay_id), nodes.get(link.station_id)
        out.append(
            LinkProfile(
                link_id=link.link_id,
                relay_id=link.relay_id,
                station_id=link.station_id,
                optics=_record(LinkOptics, link.optics),
                platform=_record(Platform, relay.physical if relay else None),
                sky=_record(StationSky, station.physical if station else None),
            )
        )
    return out


def _record(kind: type[_T], values: object) -> _T | None:
    if not isinstance(values, dict):
        return None
    try:
        return from_mapping(kind, values)
    except ValueError:
        return None
