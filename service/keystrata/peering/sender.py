"""Deliver outbox messages to peers, in order per destination, several per request;
retry with backoff until they are acknowledged."""

from __future__ import annotations

import logging
from datetime import timedelta

from keystrata.context import NodeContext
from keystrata.errors import PeerUnavailable
from keystrata.peering import outbox
from keystrata.peering.client import PeerClient
from keystrata.peering.messages import MAX_BATCH
from keystrata.storage import leases

log = logging.getLogger("keystrata.outbox")

#: Bodies per request at most (a relay.ciphertext of a 256 KiB segment is about 350 KB
#: of JSON); one message larger than this still goes, alone.
BATCH_BYTES = 1024 * 1024

#: A head refused this many times in a row is logged as blocking its destination
#: (then again at every doubling), whatever the status.
BLOCKED_AFTER = 8


def deliver_once(ctx: NodeContext, peers: PeerClient, holder: str | None = None) -> int:
    """Send one run of due messages to every due destination. Returns how many were
    acknowledged (more than 0: call again at once, there may be more).

    Per destination, under its lease: the oldest messages in id order, in one request;
    the first that is not acknowledged stops the run. A 200 answer acknowledges (the
    receiver applied it, or had already). Anything else (not applicable yet, refused,
    peer down) backs that message off, and with it every later message to the same
    destination: a message is never dropped or overtaken, so the two sides of a segment
    cannot drift apart; a stuck message shows its last error in the outbox until an
    operator sees to it.
    """
    holder = holder or leases.new_holder()
    settings = ctx.settings.outbox
    cap = timedelta(seconds=settings.max_backoff_seconds)
    # The lease and the claims must outlast the request (timeout per phase, and margin).
    ttl = max(outbox.CLAIM, timedelta(seconds=4 * settings.timeout_seconds + 5))
    acknowledged = 0
    for destination in outbox.due_destinations(ctx.db, now=ctx.clock.now()):
        claimed = outbox.claim_next(
            ctx.db,
            destination,
            holder=holder,
            now=ctx.clock.now(),
            limit=min(settings.batch, MAX_BATCH),
            max_bytes=BATCH_BYTES,
            ttl=ttl,
        )
        if not claimed:
            continue  # another worker is sending to it, or it is not due after all
        acknowledged += _send(ctx, peers, claimed, holder=holder, cap=cap)
    return acknowledged


def _send(
    ctx: NodeContext,
    peers: PeerClient,
    claimed: list[outbox.Pending],
    *,
    holder: str,
    cap: timedelta,
) -> int:
    destination = claimed[0].destination
    error: str | None = None
    done = 0
    try:
        results = peers.post_messages(destination, [m.raw for m in claimed])
    except PeerUnavailable as exc:
        results, error = [], str(exc)
    except Exception:
        # Give the lease back before the loop reports the failure, so that another
        # worker need not wait for it to expire.
        outbox.settle(
            ctx.db,
            claimed,
            holder=holder,
            now=ctx.clock.now(),
            acknowledged=0,
            error=None,
            max_backoff=cap,
        )
        raise
    for result in results:
        if result.status == 200:
            done += 1
            continue
        error = f"{result.status}: {(result.message or '')[:200]}"
        if result.status not in (409, 503):
            log.warning("outbox: %s to %s refused (%s)", claimed[done].kind, destination, error)
        break
    if error is None and done == 0:
        error = "the peer answered for no message"
    if error is not None and done < len(claimed):
        refused = claimed[done]
        if refused.attempts + 1 >= BLOCKED_AFTER and _power_of_two(refused.attempts + 1):
            log.warning(
                "outbox: messages to %s wait behind message %d (%s), refused %d times; "
                "last error: %s",
                destination,
                refused.id,
                refused.kind,
                refused.attempts + 1,
                error,
            )
    outbox.settle(
        ctx.db,
        claimed,
        holder=holder,
        now=ctx.clock.now(),
        acknowledged=done,
        error=error,
        max_backoff=cap,
    )
    return done


def _power_of_two(n: int) -> bool:
    return n > 0 and n & (n - 1) == 0
