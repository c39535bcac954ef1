"""The dashboard's history: a compact time series of what the node shows now.

Every ``[dashboard] sample_seconds`` one worker process of the node (the holder of the
lease ``dashboard-history``) reads the node's figures (node/readings.py) and writes one
``history_sample`` row per series and subject (a link or pair ID), and deletes the rows
older than ``[dashboard] retention_days``, in one transaction. The series are fixed
(:data:`SERIES`); a figure the node does not know (no plan without a link profile, no
QBER without a block in the rate window, no target at a station) is not written, so a
plot shows a gap rather than a made-up value.

:func:`points` reads one series back for the dashboard, at most ``limit`` points per
subject, evenly thinned when the span holds more.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta

from sqlalchemy import delete, func, insert, select

from keystrata.context import NodeContext
from keystrata.node import readings
from keystrata.node.readings import LinkReading, PairReading, Readings
from keystrata.storage import leases
from keystrata.storage.models import HistorySample

LEASE = "dashboard-history"


@dataclass(frozen=True, slots=True)
class Series:
    """One series: what it holds, its unit, and how it is read from the figures."""

    name: str
    unit: str
    title: str


#: Series of links, and how each is read from a link's figures.
LINK_SERIES: dict[str, tuple[Series, Callable[[LinkReading], float | None]]] = {
    "link_rate_bps": (
        Series("link_rate_bps", "bit/s", "link key received per second"),
        lambda r: r.rate_bps,
    ),
    "link_planned_bps": (
        Series("link_planned_bps", "bit/s", "the link model's clear-sky rate"),
        lambda r: r.planned_bps,
    ),
    "link_pool_bits": (
        Series("link_pool_bits", "bit", "link key stored, not yet used"),
        lambda r: r.bits_available,
    ),
    "link_qber": (
        Series("link_qber", "ratio", "QBER of the blocks received"),
        lambda r: r.qber,
    ),
}

#: Series of pairs, and how each is read from a pair's figures.
PAIR_SERIES: dict[str, tuple[Series, Callable[[PairReading], float | None]]] = {
    "pair_ready_bits": (
        Series("pair_ready_bits", "bit", "ready pair key (relay: the smaller report)"),
        lambda r: r.ready_bits,
    ),
    "pair_owned_bits": (
        Series("pair_owned_bits", "bit", "ready key this station serves to its masters"),
        lambda r: r.owned_bits,
    ),
    "pair_pending_bits": (
        Series("pair_pending_bits", "bit", "pair key waiting for confirmation"),
        lambda r: r.pending_bits,
    ),
    "pair_target_bits": (
        Series("pair_target_bits", "bit", "ready key the relay's scheduler aims at"),
        lambda r: r.target_bits,
    ),
    "pair_in_flight_bits": (
        Series("pair_in_flight_bits", "bit", "pair key made, not yet settled"),
        lambda r: r.in_flight_bits,
    ),
    "pair_relayed_bps": (
        Series("pair_relayed_bps", "bit/s", "pair key the relay made per second"),
        lambda r: r.relayed_bps,
    ),
}

#: Series of key delivery at a station, per pair (cumulative counts).
DELIVERY_SERIES: dict[str, Series] = {
    "keys_delivered": Series("keys_delivered", "keys", "keys handed out (masters and slaves)"),
    "key_bits_delivered": Series("key_bits_delivered", "bit", "bits of the keys handed out"),
}

SERIES: dict[str, Series] = {
    **{k: v[0] for k, v in LINK_SERIES.items()},
    **{k: v[0] for k, v in PAIR_SERIES.items()},
    **DELIVERY_SERIES,
}


def rows_of(figures: Readings) -> list[tuple[str, str, float]]:
    """The (series, subject, value) rows of one reading; unknown figures are left out."""
    out: list[tuple[str, str, float]] = []
    for link in figures.links:
        for name, (_, value_of) in LINK_SERIES.items():
            value = value_of(link)
            if value is not None and math.isfinite(value):
                out.append((name, link.link_id, float(value)))
    for pair in figures.pairs:
        for name, (_, pair_value_of) in PAIR_SERIES.items():
            value = pair_value_of(pair)
            if value is not None and math.isfinite(value):
                out.append((name, pair.pair_id, float(value)))
    for delivered in figures.deliveries:
        parts = (delivered["to_masters"], delivered["to_slaves"])
        subject = str(delivered["pair_id"])
        out.append(("keys_delivered", subject, float(sum(p["keys"] for p in parts))))
        out.append(("key_bits_delivered", subject, float(sum(p["bits"] for p in parts))))
    return out


def sample_once(ctx: NodeContext, holder: str) -> bool:
    """Take one sample if this process holds the history lease and the last sample is
    older than half the sampling interval (another holder may have just taken one);
    delete samples older than the retention. Returns False (one step per interval).

    Raises:
        Unavailable: the database cannot be reached (the loop tries again).
    """
    cfg = ctx.settings.dashboard
    now = ctx.clock.now()
    ttl = timedelta(seconds=max(10.0, 3 * cfg.sample_seconds))
    if not leases.acquire(ctx.db, LEASE, holder, now=now, ttl=ttl):
        return False
    with ctx.db.read() as s:
        last = s.execute(select(func.max(HistorySample.at))).scalar_one_or_none()
    if last is not None and (now - _aware(last)).total_seconds() < cfg.sample_seconds / 2:
        return False
    figures = readings.read(ctx)
    write(ctx, figures)
    return False


def write(ctx: NodeContext, figures: Readings) -> int:
    """Store one reading and drop what is past the retention, in one transaction;
    return the rows written."""
    rows = rows_of(figures)
    cutoff = figures.at - timedelta(days=ctx.settings.dashboard.retention_days)
    with ctx.db.write() as s:
        if rows:
            s.execute(
                insert(HistorySample),
                [{"at": figures.at, "series": n, "subject": sub, "value": v} for n, sub, v in rows],
            )
        s.execute(delete(HistorySample).where(HistorySample.at < cutoff))
    return len(rows)


@dataclass(frozen=True, slots=True)
class Points:
    subject: str
    #: (Unix time in seconds, value), oldest first.
    points: list[tuple[float, float]]


def points(
    ctx: NodeContext,
    series: str,
    *,
    subject: str | None,
    since: datetime,
    until: datetime,
    limit: int,
) -> list[Points]:
    """The samples of ``series`` in ``[since, until]``, per subject (one, or each that
    has samples), thinned to at most ``limit`` evenly spaced ones (the newest kept)."""
    base = [
        HistorySample.series == series,
        HistorySample.at >= since,
        HistorySample.at <= until,
    ]
    if subject is not None:
        base.append(HistorySample.subject == subject)
    out = []
    with ctx.db.read() as s:
        counts = s.execute(
            select(HistorySample.subject, func.count())
            .where(*base)
            .group_by(HistorySample.subject)
            .order_by(HistorySample.subject)
        ).all()
        for name, count in counts:
            step = max(1, math.ceil(int(count) / limit))
            # Number the rows newest first, so that the thinning keeps the newest sample.
            numbered = (
                select(
                    HistorySample.at,
                    HistorySample.value,
                    func.row_number()
                    .over(order_by=(HistorySample.at.desc(), HistorySample.id.desc()))
                    .label("n"),
                )
                .where(*base, HistorySample.subject == name)
                .subquery()
            )
            rows = s.execute(
                select(numbered.c.at, numbered.c.value)
                .where((numbered.c.n - 1) % step == 0)
                .order_by(numbered.c.at)
            ).all()
            out.append(
                Points(
                    subject=name,
                    points=[(_aware(at).timestamp(), float(v)) for at, v in rows][-limit:],
                )
            )
    return out


def _aware(when: object) -> datetime:
    """SQLite hands back naive UTC datetimes (and aggregates of them as text);
    PostgreSQL aware ones."""
    if isinstance(when, str):
        when = datetime.fromisoformat(when)
    if not isinstance(when, datetime):
        raise TypeError(f"expected a timestamp, got {type(when).__name__}")
    return when if when.tzinfo else when.replace(tzinfo=UTC)
