"""Deliver outbox messages to peers; retry with backoff until they are acknowledged."""

from __future__ import annotations

import logging
from datetime import timedelta

from keystrata.services import outbox
from keystrata.services.context import NodeContext
from keystrata.workers.peer_client import PeerClient, PeerUnavailable

log = logging.getLogger("keystrata.outbox")


def deliver_once(ctx: NodeContext, peers: PeerClient) -> int:
    """Send every due message once. Returns how many were acknowledged.

    A 200 answer acknowledges (the receiver applied it, or had already). Anything else
    (not yet applicable, refused, peer down) leaves the message for a later attempt: a
    message is never dropped, so the two sides of a segment cannot drift apart; a stuck
    message shows its last error in the outbox until an operator sees to it.
    """
    done: list[int] = []
    cap = timedelta(seconds=ctx.settings.outbox.max_backoff_seconds)
    for message in outbox.claim(ctx.db, now=ctx.clock.now(), limit=ctx.settings.outbox.batch):
        try:
            status, answer = peers.post_message(message.destination, message.body)
        except PeerUnavailable as exc:
            outbox.retry_later(
                ctx.db, message, now=ctx.clock.now(), error=str(exc), max_backoff=cap
            )
            continue
        if status == 200:
            done.append(message.id)
        else:
            error = f"{status}: {str(answer.get('message', ''))[:200]}"
            if status not in (409, 503):
                log.warning(
                    "outbox: %s to %s refused (%s)", message.kind, message.destination, error
                )
            outbox.retry_later(ctx.db, message, now=ctx.clock.now(), error=error, max_backoff=cap)
    outbox.delivered(ctx.db, done)
    return len(done)
