"""The ledger record of a peer message refused for what it claims (403)."""

from __future__ import annotations

import logging

from keystrata.context import NodeContext
from keystrata.errors import Forbidden
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.peering import messages
from keystrata.storage.models import Pair

log = logging.getLogger("keystrata.peers")


def record_refusal(
    ctx: NodeContext, sender: str, msg: messages.PeerMessage, exc: Forbidden
) -> None:
    """Write ``peer.message_refused`` in its own transaction (the refused change rolled
    back). The pair is named only when it is registered here; the reason is the code of
    the check that failed, never a value from the message."""
    pair_id = getattr(msg, "pair_id", None)
    log.warning("refused %s from %s: %s", msg.kind, sender, exc.message)
    with ctx.db.write() as s:
        if pair_id is not None and s.get(Pair, pair_id) is None:
            pair_id = None
        chain.append(
            s,
            node_id=ctx.node_id,
            at=ctx.clock.now(),
            event=Event.PEER_MESSAGE_REFUSED,
            fields={
                "sender": sender,
                "kind": msg.kind,
                "pair": pair_id,
                "reason": exc.message[:120],
            },
        )
