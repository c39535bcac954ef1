"""The key-supply plan of a node's network for one UTC day: per link and per pair.

Per link, the link model's day (``keystrata_physics.availability``). Per pair, the expected
link key of its two links shared between the pairs on each link by the scheduler's own
fairness rule (weighted max-min, weights the pairs' priorities, demands their daily
demand): a pair's supply is what that rule gives it when it asks for all it can get and
the others ask for their demand. Against its demand: surplus or shortfall, time until
empty at today's rate, and the buffer that rides out a cloud spell with the stated
probability.

A pair's demand is what its stations measured (the relay's view of their buffer reports:
bits delivered plus bits asked for and not ready, over the rate window), else its policy's
``daily_quota_bits``, else unknown (the pair then takes its fair share of what is left).
The one-time MAC of every forwarded segment costs 32 bytes of link key per segment; the
plan charges it to both links of every pair, which overstates it by at most
32 / segment_bytes (0.012 % at the default 256 KiB).
"""

from __future__ import annotations

import dataclasses
import math
from datetime import date
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from keystrata.config import Role
from keystrata.context import NodeContext
from keystrata.relay import buffers, fairness
from keystrata.storage.models import Pair
from keystrata.supply.profiles import LinkProfile, link_profiles
from keystrata_physics import availability, link, supply
from keystrata_physics.link import LinkPoint

#: The chance, per cloud spell, that the planned buffer runs dry.
SPELL_SHORTFALL = 0.01

CAUTION = (
    "Engineering estimates from the link model, not a security proof: the security of "
    "delivered key comes from the QKD modules' own post-processing. Laser beacons and "
    "free-space optics are regulated (laser safety, aviation authority): follow local "
    "rules and your accreditation authority."
)

SECONDS_PER_DAY = 86_400

#: Channel losses of the rate-against-loss curve, dB, at night (sun well below the horizon).
SWEEP_DB = [1.0 + 2.0 * i for i in range(40)]
NIGHT_SUN_DEG = -30.0


def _r(value: float | None, digits: int = 4) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return float(f"{value:.{digits}g}")


def _point(point: LinkPoint) -> dict[str, Any]:
    budget = point.budget
    return {
        "slant_range_m": _r(point.slant_range_m, 6),
        "elevation_deg": _r(point.elevation_deg, 4),
        "footprint_diameter_m": _r(budget.footprint_diameter_m) if budget else None,
        "geometric_loss_db": _r(budget.geometric_db) if budget else None,
        "pointing_loss_db": _r(budget.pointing_db) if budget else None,
        "atmospheric_loss_db": _r(budget.atmospheric_db) if budget else None,
        "turbulence_loss_db": _r(budget.turbulence_db) if budget else None,
        "receiver_loss_db": _r(budget.receiver_db) if budget else None,
        "channel_loss_db": _r(budget.channel_db) if budget else None,
        "total_loss_db": _r(budget.total_db) if budget else None,
        "background_per_gate": _r(point.background_per_gate),
        "qber": _r(point.qber),
        "secret_key_rate_bps": _r(point.secret_key_rate_bps),
        "plob_bound_bps": _r(point.plob_bound_bps),
        "below_plob_db": _r(point.below_bound_db),
    }


def link_plan(profile: LinkProfile, day: date) -> tuple[dict[str, Any], float]:
    """One link's plan as JSON, and its expected secret bits for the day."""
    head: dict[str, Any] = {
        "link_id": profile.link_id,
        "relay_id": profile.relay_id,
        "station_id": profile.station_id,
    }
    if profile.optics is None or profile.platform is None or profile.sky is None:
        return head | {"protocol": None, "planned": False, "missing": profile.missing}, 0.0
    planned = availability.day_profile(profile.optics, profile.platform, profile.sky, day)
    span = availability.span(profile.platform, profile.sky)
    out = head | {"protocol": profile.optics.protocol.value, "planned": True, "missing": []}
    out |= _point(planned.point)
    out |= {
        "best_hour_utc": next(
            h.utc_hour
            for h in planned.hours
            if h.secret_key_rate_bps == planned.point.secret_key_rate_bps
        ),
        "slant_range_span_m": [_r(span.min_range_m, 6), _r(span.max_range_m, 6)],
        "elevation_span_deg": [_r(span.min_elevation_deg), _r(span.max_elevation_deg)],
        "daily_secret_bits": _r(planned.expected_bits, 6),
        "daily_secret_bits_sd": _r(planned.sd_bits, 4),
        "clear_sky_daily_bits": _r(planned.clear_sky_bits, 6),
        "rate_vs_loss": [
            {
                "channel_loss_db": loss,
                "secret_key_rate_bps": _r(rate),
                "plob_bound_bps": _r(bound),
            }
            for loss, rate, bound in link.loss_sweep(
                profile.optics,
                SWEEP_DB,
                background_per_gate=link.sky_counts(profile.optics, profile.sky, NIGHT_SUN_DEG),
            )
        ],
        "hourly": [
            {
                "hour_utc": h.utc_hour,
                "sun_elevation_deg": _r(h.sun_elevation_deg, 3),
                "on_station": h.on_station,
                "clear_probability": _r(h.clear_probability, 3),
                "qber": _r(h.qber),
                "secret_key_rate_bps": _r(h.secret_key_rate_bps),
                "expected_rate_bps": _r(h.expected_rate_bps),
            }
            for h in planned.hours
        ],
    }
    return out, planned.expected_bits


def _observed_demand(ctx: NodeContext) -> dict[str, tuple[float | None, int]]:
    """Per pair: measured demand in bits/s (``None`` unmeasured) and the ready bits."""
    if ctx.role is not Role.RELAY:
        return {}
    out = {}
    for view in buffers.relay_view(ctx):
        ready = min(int(side["ready_bits"] or 0) for side in view.sides)
        out[view.pair_id] = (view.consumption_bps, ready)
    return out


def pair_plans(
    ctx: NodeContext,
    pairs: list[Pair],
    profiles: list[LinkProfile],
    daily_bits: dict[str, float],
) -> list[dict[str, Any]]:
    """Every pair's plan, sharing each link's expected key by the scheduler's fairness."""
    by_ends = {(p.relay_id, p.station_id): p for p in profiles}
    segment = ctx.settings.relay.segment_bytes
    observed = _observed_demand(ctx)
    rows = []
    for pair in pairs:
        ends = [by_ends.get((pair.relay_id, st)) for st in (pair.station_a, pair.station_b)]
        measured, ready = observed.get(pair.pair_id, (None, None))
        if measured is not None:
            demand_bits, source = measured * SECONDS_PER_DAY, "observed"
        elif pair.daily_quota_bits is not None:
            demand_bits, source = float(pair.daily_quota_bits), "policy"
        else:
            demand_bits, source = None, None
        rows.append((pair, ends, demand_bits, source, ready))
    usable = segment / (segment + supply.MAC_KEY_BYTES)
    available = {lid: int(bits * usable / 8) for lid, bits in daily_bits.items()}
    unbounded = sum(available.values()) + 1
    demands = [
        fairness.PairDemand(
            pair_id=pair.pair_id,
            links=(ends[0].link_id, ends[1].link_id),
            weight=pair.priority,
            demand=unbounded if demand is None else int(demand / 8),
        )
        for pair, ends, demand, _, _ in rows
        if ends[0] is not None and ends[1] is not None
    ]
    shares = _supplies(demands, available, unbounded)
    out = []
    for pair, ends, demand, source, ready in rows:
        missing = [
            f"link between {pair.relay_id} and {st}"
            for st, e in zip((pair.station_a, pair.station_b), ends, strict=True)
            if e is None
        ]
        planned = not missing and all(e is not None and not e.missing for e in ends)
        supply_bits = 8.0 * shares.get(pair.pair_id, 0) if planned else None
        spell = max((e.sky.mean_cloud_spell_s for e in ends if e and e.sky), default=0.0)
        demand_bps = demand / SECONDS_PER_DAY if demand is not None else None
        out.append(
            {
                "pair_id": pair.pair_id,
                "stations": [pair.station_a, pair.station_b],
                "links": [e.link_id if e else None for e in ends],
                "priority": pair.priority,
                "planned": planned,
                "missing": missing + [m for e in ends if e for m in e.missing],
                "daily_supply_bits": _r(supply_bits, 6),
                "daily_demand_bits": _r(demand, 6),
                "demand_source": source,
                "daily_surplus_bits": _r(supply_bits - demand, 6)
                if supply_bits is not None and demand is not None
                else None,
                "ready_bits": ready,
                "time_until_empty_s": _r(
                    supply.seconds_until_empty(ready, demand_bps, supply_bits / SECONDS_PER_DAY)
                )
                if ready is not None and demand_bps is not None and supply_bits is not None
                else None,
                "buffer_bits_needed": _r(
                    supply.buffer_for_spell_bits(demand_bps, spell, SPELL_SHORTFALL), 6
                )
                if demand_bps is not None
                else None,
                "spell_shortfall_probability": SPELL_SHORTFALL,
                "mean_cloud_spell_s": spell,
            }
        )
    return out


def _supplies(
    demands: list[fairness.PairDemand], available: dict[str, int], unbounded: int
) -> dict[str, int]:
    """Each pair's daily supply in bytes: its fair share when it asks for as much as it
    can get while every other pair asks for its demand (what it could take today)."""
    out = {}
    for mine in demands:
        asks = [d if d is not mine else dataclasses.replace(d, demand=unbounded) for d in demands]
        out[mine.pair_id] = fairness.allocate(asks, available)[mine.pair_id]
    return out


def network_plan(ctx: NodeContext, day: date) -> dict[str, Any]:
    """The whole plan this node can make from its registry, for UTC ``day``."""
    with ctx.db.read() as s:
        profiles = link_profiles(s)
        pairs = (
            buffers.pairs_through(s, ctx.node_id)
            if ctx.role is Role.RELAY
            else [p for p in _active_pairs(s) if ctx.node_id in (p.station_a, p.station_b)]
        )
    links, daily = [], {}
    for profile in profiles:
        row, bits = link_plan(profile, day)
        links.append(row)
        daily[profile.link_id] = bits
    return {
        "node_id": ctx.node_id,
        "day": day.isoformat(),
        "caution": CAUTION,
        "links": links,
        "pairs": pair_plans(ctx, pairs, profiles, daily),
    }


def _active_pairs(s: Session) -> list[Pair]:
    return list(
        s.execute(select(Pair).where(Pair.retired_at.is_(None)).order_by(Pair.pair_id)).scalars()
    )
