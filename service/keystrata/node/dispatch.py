"""Dispatch of node-to-node messages to their handlers, by node role and message kind.

Every body is parsed once into its typed model (:mod:`keystrata.peering.messages`):
an unknown kind or version, or a malformed member, is a 400 before anything is read
from the database. Handlers then check what the message claims against this node's own
registry and rows; a claim that is not the sender's to make is refused (403), changes
nothing, and is recorded as ``peer.message_refused`` (sender, kind, reason code: never
the values the sender chose). A programming error inside a handler is a 500 that is
logged, never a 400.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from typing import Any

from keystrata.config import Role
from keystrata.context import NodeContext
from keystrata.delivery import slave_copy
from keystrata.errors import Forbidden, InvalidInput, KeystrataError
from keystrata.peering import messages
from keystrata.peering.messages import MessageResult
from keystrata.peering.refusals import record_refusal
from keystrata.relay import confirmation, segments

log = logging.getLogger("keystrata.peers")

Handler = Callable[[NodeContext, str, Any], MessageResult]

HANDLERS: dict[Role, dict[type[messages.PeerMessage], Handler]] = {
    Role.STATION: {
        messages.RelayNotice: segments.apply_notice,
        messages.RelayCiphertext: segments.apply_ciphertext,
        messages.SegmentCheck: confirmation.apply_check,
        messages.SegmentConfirmed: confirmation.apply_confirmed,
        messages.SegmentDiscarded: confirmation.apply_discarded,
        messages.KeyAllocated: slave_copy.apply_allocated,
        messages.KeyExpired: slave_copy.apply_expired,
    },
    Role.RELAY: {messages.SegmentSettled: confirmation.apply_settled},
}


def read(ctx: NodeContext, body: Any) -> messages.PeerMessage:
    """Parse a body into a message this node takes. Raises InvalidInput (400)."""
    msg = messages.parse(body)
    if type(msg) not in HANDLERS[ctx.role]:
        raise InvalidInput(f"kind: a {ctx.role.value} does not take {msg.kind} messages")
    return msg


def apply(ctx: NodeContext, sender: str, msg: messages.PeerMessage) -> MessageResult:
    """Apply one parsed message from peer node ``sender``; a refusal is recorded.

    Raises:
        Forbidden: the message claims what is not the sender's to claim (recorded).
        OutOfOrder / LinkKeyReused (409), NotFound (404), InvalidInput (400).
    """
    try:
        return HANDLERS[ctx.role][type(msg)](ctx, sender, msg)
    except Forbidden as exc:
        record_refusal(ctx, sender, msg, exc)
        raise


def handle(ctx: NodeContext, sender: str, body: Any) -> MessageResult:
    """Parse and apply one message from peer node ``sender`` (see :func:`apply`)."""
    return apply(ctx, sender, read(ctx, body))


def handle_batch(ctx: NodeContext, sender: str, bodies: list[Any]) -> list[MessageResult]:
    """Apply messages from ``sender`` in order, each as if it came alone (its own
    transaction; a run of ``key.allocated`` messages shares one, each in a savepoint),
    and stop at the first that is not applied: the sender's later messages
    to this node wait behind it (a later range would be refused "not yet" anyway).
    Returns one result per message attempted, the last being the refusal if any.

    Raises:
        InvalidInput: ``bodies`` holds something that is not a message this node takes
            (checked for every message before any is applied, so nothing changes).
    """
    msgs: list[messages.PeerMessage] = []
    for i, body in enumerate(bodies):
        try:
            msgs.append(read(ctx, body))
        except InvalidInput as exc:
            raise InvalidInput(f"messages[{i}]: {exc.message}", details=exc.details) from None
    results: list[MessageResult] = []
    i = 0
    while i < len(msgs):
        run = _allocations_from(msgs, i)
        if run:
            # Key allocations come in long runs under load: one transaction for a run.
            try:
                applied, error = slave_copy.apply_allocated_run(ctx, sender, run)
            except KeystrataError as exc:
                applied, error = [], exc
            results += applied
            if error is not None:
                if isinstance(error, Forbidden):
                    record_refusal(ctx, sender, run[len(applied)], error)
                results.append(MessageResult.failed(error))
                break
            i += len(run)
            continue
        try:
            results.append(apply(ctx, sender, msgs[i]))
        except KeystrataError as exc:
            results.append(MessageResult.failed(exc))
            break
        i += 1
    return results


def _allocations_from(msgs: list[messages.PeerMessage], start: int) -> list[messages.KeyAllocated]:
    """The run of ``key.allocated`` messages at ``start``."""
    run: list[messages.KeyAllocated] = []
    for msg in msgs[start:]:
        if not isinstance(msg, messages.KeyAllocated):
            break
        run.append(msg)
    return run
