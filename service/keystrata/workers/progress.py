"""The restore check's loop at a station: at start (in every worker process, before it
serves: a hold found then is in place before the first request) and then every
``[restore_check] interval_seconds`` in one worker per node, under a database lease."""

from __future__ import annotations

import logging
from datetime import timedelta

from keystrata.services import leases, progress
from keystrata.services.context import NodeContext

log = logging.getLogger("keystrata.workers")

LEASE = "restore-check"


def at_start(ctx: NodeContext, source: progress.ProgressSource) -> None:
    """Compare every pair once; a partner that cannot be asked now is compared later."""
    try:
        progress.check_all(ctx, source)
    except Exception:  # a start must not fail on a partner's bad moment
        log.exception("restore check at start failed; the periodic check retries")


def check_once(ctx: NodeContext, source: progress.ProgressSource, holder: str) -> bool:
    """One periodic round if this process holds the lease; False (nothing to hurry)."""
    interval = ctx.settings.restore_check.interval_seconds
    ttl = timedelta(seconds=max(30.0, 3 * interval))
    if leases.acquire(ctx.db, LEASE, holder, now=ctx.clock.now(), ttl=ttl):
        progress.check_all(ctx, source)
    return False
