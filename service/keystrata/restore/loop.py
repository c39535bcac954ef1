"""The restore check's loop at a station: at start (in every worker process, before it
serves: a hold found then is in place before the first request) and then every
``[restore_check] interval_seconds`` in one worker per node, under a database lease."""

from __future__ import annotations

import logging
import time
from datetime import timedelta

from keystrata.context import NodeContext
from keystrata.restore import comparison, holds, points
from keystrata.storage import leases

log = logging.getLogger("keystrata.workers")

LEASE = "restore-check"


def at_start(ctx: NodeContext, source: points.ProgressSource) -> None:
    """Compare every pair once. The partners of pairs that could not be compared now stay
    unverified in this process: their pairs serve nothing here (503, try again) until a
    later round compares them, so a restored station cannot serve before it knows."""
    pending = holds.unverified(ctx)
    try:
        missed = comparison.check_all(ctx, source)
    except Exception:  # a start must not fail on a partner's bad moment
        log.exception("restore check at start failed; the periodic check retries")
        missed = _partners(ctx)
    pending.clear()
    pending.update(missed)
    if missed:
        log.warning("restore check: not compared yet with %s; their pairs wait", sorted(missed))


def _partners(ctx: NodeContext) -> set[str]:
    from keystrata.storage.models import Pair

    with ctx.db.read() as s:
        pairs = s.query(Pair).filter(Pair.retired_at.is_(None)).all()
        return {
            p.station_b if p.station_a == ctx.node_id else p.station_a
            for p in pairs
            if ctx.node_id in (p.station_a, p.station_b)
        }


def check_once(ctx: NodeContext, source: points.ProgressSource, holder: str) -> bool:
    """Compare again the pairs of partners not compared since start (every worker, each
    round), and every pair once per ``[restore_check] interval_seconds`` if this process
    holds the lease. Returns False (nothing to hurry)."""
    pending = holds.unverified(ctx)
    if pending:
        still = comparison.check_all(ctx, source, only=set(pending))
        pending.intersection_update(still)
    interval = ctx.settings.restore_check.interval_seconds
    now = time.monotonic()
    due = ctx.process_state.get(_DUE, 0.0)
    if now < due:
        return False
    ttl = timedelta(seconds=max(30.0, 3 * interval))
    if leases.acquire(ctx.db, LEASE, holder, now=ctx.clock.now(), ttl=ttl):
        comparison.check_all(ctx, source)
        ctx.process_state[_DUE] = now + interval
    return False


#: ``ctx.process_state`` key: when this process's next full round is due (monotonic seconds).
_DUE = "progress.next_round"
#: How often a worker looks again at partners it has not compared yet.
RETRY_SECONDS = 1.0
