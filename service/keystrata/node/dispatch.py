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

from sqlalchemy.orm import Session

from keystrata.config import Role
from keystrata.context import NodeContext
from keystrata.delivery import slave_copy
from keystrata.errors import Forbidden, InvalidInput, KeystrataError
from keystrata.ledger import chain
from keystrata.peering import messages
from keystrata.peering.messages import MessageResult
from keystrata.peering.refusals import record_refusal
from keystrata.relay import confirmation, segments

log = logging.getLogger("keystrata.peers")

Handler = Callable[[NodeContext, str, Any], MessageResult]
InSession = Callable[[NodeContext, Session, str, Any], MessageResult]

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

#: The same handlers inside the caller's write transaction: a run of these messages in
#: one request is applied in one transaction (one commit, one fsync), each in a
#: savepoint, so the relay's segments cost a commit per request rather than per message.
#: At a station only the relay's messages run together: a run from the other station
#: may mix ``key.allocated`` (which takes from a segment's front, then appends to the
#: ledger) with segment messages, and while such a run held the ledger head from an
#: earlier message, a Get key with key IDs pulling the same allocations held a segment
#: it wanted and waited for the head: PostgreSQL deadlocks, seen as 503s in the load test.
IN_SESSION: dict[Role, dict[type[messages.PeerMessage], InSession]] = {
    Role.STATION: {
        messages.RelayNotice: segments.apply_notice_in,
        messages.RelayCiphertext: segments.apply_ciphertext_in,
        messages.KeyAllocated: slave_copy.apply_allocated_in,
    },
    Role.RELAY: {messages.SegmentSettled: confirmation.apply_settled_in},
}

#: Bytes of bodies one transaction applies at most (the first message always): the
#: sender's request is bounded already (peering/sender.py), this keeps a receiver's
#: transaction short whatever a peer sends.
RUN_BYTES = 4 << 20


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
    """Apply messages from ``sender`` in order, each as if it came alone, and stop at the
    first that is not applied: the sender's later messages to this node wait behind it
    (a later range would be refused "not yet" anyway). A run of messages with a handler
    in :data:`IN_SESSION` shares one transaction, each in a savepoint (what it changed
    is kept only if it applied). Returns one result per message attempted, the last
    being the refusal if any.

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
    in_session = IN_SESSION[ctx.role]
    results: list[MessageResult] = []
    i = 0
    while i < len(msgs):
        run = _run_from(msgs, i, in_session)
        if not run:
            try:
                results.append(apply(ctx, sender, msgs[i]))
            except KeystrataError as exc:
                results.append(MessageResult.failed(exc))
                break
            i += 1
            continue
        try:
            applied, error = _apply_run(ctx, sender, run, in_session)
        except KeystrataError as exc:  # the transaction itself failed: none applied
            applied, error = [], exc
        results += applied
        if error is not None:
            if isinstance(error, Forbidden):
                record_refusal(ctx, sender, run[len(applied)], error)
            results.append(MessageResult.failed(error))
            break
        i += len(run)
    return results


def _run_from(
    msgs: list[messages.PeerMessage], start: int, in_session: dict[type, InSession]
) -> list[messages.PeerMessage]:
    """The run of messages at ``start`` that :data:`IN_SESSION` can apply together, of
    at most :data:`RUN_BYTES` (a lone message longer than that is a run of one)."""
    run: list[messages.PeerMessage] = []
    size = 0
    for msg in msgs[start:]:
        if type(msg) not in in_session:
            break
        size += _size(msg)
        if run and size > RUN_BYTES:
            break
        run.append(msg)
    return run


def _size(msg: messages.PeerMessage) -> int:
    ciphertext = getattr(msg, "ciphertext", b"")
    return 512 + len(ciphertext) if isinstance(ciphertext, bytes) else 512


def _apply_run(
    ctx: NodeContext,
    sender: str,
    run: list[messages.PeerMessage],
    in_session: dict[type, InSession],
) -> tuple[list[MessageResult], KeystrataError | None]:
    """Apply ``run`` in order in one transaction, each in a savepoint; stop at the
    first that does not apply. Returns the outcomes of those applied and the error
    that stopped the run. A failure of the transaction itself raises: then none of
    them is applied."""
    outcomes: list[MessageResult] = []
    error: KeystrataError | None = None
    with ctx.db.write() as s, chain.deferred(s, node_id=ctx.node_id) as entries:
        slave_copy.lock_named_segments(s, run)
        for msg in run:
            mark = entries.mark()
            try:
                with s.begin_nested():
                    outcomes.append(in_session[type(msg)](ctx, s, sender, msg))
            except KeystrataError as exc:
                entries.back_to(mark)
                error = exc
                break
    return outcomes, error
