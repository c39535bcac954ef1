"""Dispatch of node-to-node messages to their handlers, by node role and message kind."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from keystrata.config import Role
from keystrata.errors import Forbidden, InvalidInput, KeystrataError
from keystrata.services import allocations, relay, segments
from keystrata.services.context import NodeContext
from keystrata.services.segments import Outcome

#: Messages per batch request at most (the sender sends fewer; see workers/outbox.py).
MAX_BATCH = 256

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
        "key.allocated": allocations.apply_allocated,
        "key.expired": allocations.apply_expired,
    },
    Role.RELAY: {"segment.settled": _settle},
}


def _handler(ctx: NodeContext, body: Any) -> Handler:
    if not isinstance(body, dict) or not isinstance(body.get("kind"), str):
        raise InvalidInput("body: a JSON object with a kind")
    handler = HANDLERS[ctx.role].get(body["kind"])
    if handler is None:
        raise InvalidInput(f"kind: a {ctx.role.value} does not take {body['kind'][:40]!r}")
    return handler


def handle(ctx: NodeContext, sender: str, body: Any) -> Outcome:
    """Apply one message from peer node ``sender``.

    Raises:
        InvalidInput: not an object with a known kind, or a field missing or malformed.
        Forbidden: the sender may not send this message.
        NotYet / LinkKeyReused (409): apply later / never.
    """
    handler = _handler(ctx, body)
    try:
        return handler(ctx, sender, body)
    except (KeyError, TypeError, ValueError) as exc:
        raise InvalidInput(f"message {body['kind']}: missing or malformed field") from exc


@dataclass(frozen=True)
class Answer:
    """What became of one message of a batch: ``status`` 200 with the outcome, or the
    status and message of the error it raised."""

    status: int
    segment_id: str | None = None
    outcome: str | None = None
    message: str | None = None


def handle_batch(ctx: NodeContext, sender: str, bodies: list[Any]) -> list[Answer]:
    """Apply messages from ``sender`` in order, each as if it came alone (its own
    transaction; a run of ``key.allocated`` messages shares one, each in a savepoint),
    and stop at the first that is not applied: the sender's later messages
    to this node wait behind it (a later range would be refused "not yet" anyway).
    Returns one answer per message attempted, the last being the refusal if any.

    Raises:
        InvalidInput: ``bodies`` holds something that is not a message this node takes
            (checked for every message before any is applied, so nothing changes).
    """
    for i, body in enumerate(bodies):
        try:
            _handler(ctx, body)
        except InvalidInput as exc:
            raise InvalidInput(f"messages[{i}]: {exc.message}") from None
    answers: list[Answer] = []
    i = 0
    while i < len(bodies):
        run = _allocations_from(ctx, bodies, i)
        if run:
            # Key allocations come in long runs under load: one transaction for a run.
            try:
                outcomes, error = allocations.apply_allocated_run(ctx, sender, run)
            except KeystrataError as exc:
                outcomes, error = [], exc
            answers += [Answer(200, o.segment_id, o.status) for o in outcomes]
            if error is not None:
                answers.append(Answer(status=error.status, message=error.message))
                break
            i += len(run)
            continue
        try:
            outcome = handle(ctx, sender, bodies[i])
        except KeystrataError as exc:
            answers.append(Answer(status=exc.status, message=exc.message))
            break
        answers.append(Answer(200, outcome.segment_id, outcome.status))
        i += 1
    return answers


def _allocations_from(ctx: NodeContext, bodies: list[Any], start: int) -> list[dict[str, Any]]:
    """The run of ``key.allocated`` messages at ``start`` (none on a relay)."""
    if ctx.role is not Role.STATION:
        return []
    run = []
    for body in bodies[start:]:
        if body.get("kind") != "key.allocated":
            break
        run.append(body)
    return run
