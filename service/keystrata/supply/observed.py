"""Planned against observed: each link's ingest rate beside what the link model expects
for this moment (clear sky, platform on station).

The plan is the clear-sky rate, so a ratio near 0 means clouds, pointing trouble or a
QKD module that stopped, and a ratio far below 1 on a clear day points at the optics
(pointing, dirty windows, a misaligned receiver). The node cannot tell these apart; it
says how far below plan the link runs and leaves the diagnosis to the operator.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime

from sqlalchemy import func, select

from keystrata.context import NodeContext
from keystrata.links import pools
from keystrata.storage.models import LinkBlock
from keystrata.supply.profiles import link_profiles
from keystrata_physics import link
from keystrata_physics.optics import LinkOptics, Platform, StationSky

#: A link whose observed rate is below this share of its plan gets a readiness note.
FAR_BELOW_PLAN = 0.5


@dataclass(frozen=True, slots=True)
class PlanCheck:
    """One link ending at this node.

    Attributes:
        link_id: the link.
        observed_bps: link key received over the rate window.
        planned_bps: the model's rate for now; ``None`` without a complete profile.
        ratio: observed / planned; ``None`` when nothing is planned (no profile, the
            platform off station, a link below the horizon or with no key by the model).
        window_full: the link's first block arrived at least a rate window ago, so the
            observed rate is an average over a whole window, not over part of one.
    """

    link_id: str
    observed_bps: float
    planned_bps: float | None
    ratio: float | None
    window_full: bool

    @property
    def far_below(self) -> bool:
        return self.window_full and self.ratio is not None and self.ratio < FAR_BELOW_PLAN


def planned_rate_bps(
    optics: LinkOptics, platform: Platform, sky: StationSky, when: datetime
) -> float:
    """The model's rate for ``when``: clear sky, 0 while the platform is off station."""
    hour = when.astimezone(UTC)
    if not platform.on_station(hour.hour + hour.minute / 60 + hour.second / 3600):
        return 0.0
    return link.at(optics, platform, sky, when).secret_key_rate_bps


def plan_checks(ctx: NodeContext, levels: list[pools.PoolLevel] | None = None) -> list[PlanCheck]:
    """Planned against observed for every active link ending at this node (or for the
    pool ``levels`` given, read by the caller)."""
    now = ctx.clock.now()
    with ctx.db.read() as s:
        profiles = {p.link_id: p for p in link_profiles(s)}
        first = dict(
            s.execute(
                select(LinkBlock.link_id, func.min(LinkBlock.received_at)).group_by(
                    LinkBlock.link_id
                )
            ).all()
        )
    out = []
    for level in pools.pool_levels(ctx) if levels is None else levels:
        profile = profiles.get(level.link_id)
        planned = None
        if profile and profile.optics and profile.platform and profile.sky:
            planned = planned_rate_bps(profile.optics, profile.platform, profile.sky, now)
        began = first.get(level.link_id)
        full = began is not None and (now - _aware(began)).total_seconds() >= level.window_seconds
        out.append(
            PlanCheck(
                link_id=level.link_id,
                observed_bps=level.rate_bps,
                planned_bps=planned,
                ratio=level.rate_bps / planned if planned else None,
                window_full=full,
            )
        )
    return out


def _aware(when: datetime) -> datetime:
    # SQLite hands back naive UTC datetimes; PostgreSQL aware ones.
    return when if when.tzinfo else when.replace(tzinfo=UTC)
