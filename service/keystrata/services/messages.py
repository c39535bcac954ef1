"""Dispatch of node-to-node messages to their handlers, by node role and message kind."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from keystrata.config import Role
from keystrata.errors import Forbidden, InvalidInput
from keystrata.services import delivery, relay, segments
from keystrata.services.context import NodeContext
from keystrata.services.segments import Outcome

Handler = Callable[[NodeContext, str, dict[str, Any]], Outcome]


def _settle(ctx: NodeContext, sender: str, body: dict[str, Any]) -> Outcome:
    segment_id = str(body["segment_id"])
    if relay.notice_station_of(ctx, segment_id) != sender:
        raise Forbidden("only the segment's notice station settles it")
    changed = relay.settle(ctx, segment_id, str(body["outcome"]), body.get("reason"))
    return Outcome(segment_id, "applied" if changed else "already")


HANDLERS: dict[Role, dict[str, Handler]] = {
    Role.STATION: {
        "relay.notice": segments.apply_notice,
        "relay.ciphertext": segments.apply_ciphertext,
        "segment.check": segments.apply_check,
        "segment.confirmed": segments.apply_confirmed,
        "segment.discarded": segments.apply_discarded,
        "key.allocated": delivery.apply_allocated,
        "key.expired": delivery.apply_expired,
    },
    Role.RELAY: {"segment.settled": _settle},
}


def handle(ctx: NodeContext, sender: str, body: Any) -> Outcome:
    """Apply one message from peer node ``sender``.

    Raises:
        InvalidInput: not an object with a known kind, or a field missing or malformed.
        Forbidden: the sender may not send this message.
        NotYet / LinkKeyReused (409): apply later / never.
    """
    if not isinstance(body, dict) or not isinstance(body.get("kind"), str):
        raise InvalidInput("body: a JSON object with a kind")
    handler = HANDLERS[ctx.role].get(body["kind"])
    if handler is None:
        raise InvalidInput(f"kind: a {ctx.role.value} does not take {body['kind'][:40]!r}")
    try:
        return handler(ctx, sender, body)
    except (KeyError, TypeError, ValueError) as exc:
        raise InvalidInput(f"message {body['kind']}: missing or malformed field") from exc
