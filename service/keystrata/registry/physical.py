"""Registry rules that need the link model: a physical profile must leave every link it
touches flyable (the platform above the station's horizon, with margin)."""

from __future__ import annotations

from typing import Any

from sqlalchemy import or_, select
from sqlalchemy.orm import Session

from keystrata.errors import InvalidInput
from keystrata.registry.specs import Kind
from keystrata.storage.models import QkdLink, RegistryNode
from keystrata_physics import geometry
from keystrata_physics import link as link_model
from keystrata_physics.link import MIN_ELEVATION_DEG
from keystrata_physics.optics import Platform, StationSky, from_mapping


def check_geometry(s: Session, kind: Kind, row: Any, field: str) -> None:
    """Refuse a profile that puts a link's platform too low over its station to fly it.

    Checked for the active links the entry touches whose three profiles (the relay's
    platform, the station's site, the link's optics) are all present.

    Raises:
        InvalidInput: a link would see its platform below the link model's minimum
            elevation (the horizon or just above it).
    """
    if kind is Kind.LINKS:
        links = [row]
    elif kind is Kind.NODES:
        links = list(
            s.execute(
                select(QkdLink).where(
                    or_(QkdLink.relay_id == row.node_id, QkdLink.station_id == row.node_id),
                    QkdLink.retired_at.is_(None),
                )
            ).scalars()
        )
    else:
        return
    for link in links:
        relay, station = s.get(RegistryNode, link.relay_id), s.get(RegistryNode, link.station_id)
        if link.optics is None or relay is None or station is None:
            continue
        if relay.physical is None or station.physical is None:
            continue
        platform = from_mapping(Platform, relay.physical)
        sky = from_mapping(StationSky, station.physical)
        seen = geometry.look(link_model.station_site(sky), link_model.platform_site(platform))
        if seen.elevation_deg < MIN_ELEVATION_DEG:
            message = (
                f"{field}: {station.node_id} would see the platform of {relay.node_id} at "
                f"{seen.elevation_deg:.1f} deg elevation ({seen.slant_range_m / 1000:.0f} km "
                f"away), below the {MIN_ELEVATION_DEG:g} deg link {link.link_id} needs"
            )
            raise InvalidInput(
                message, details=[{"field": field, "problem": "platform below the horizon"}]
            )
