"""Transactional outbox: messages to peer nodes are written in the transaction that
decides to send them, and delivered afterwards with retries and backoff. Receivers are
idempotent by segment ID, so a crash or a lost reply only causes a resend.

Delivery is ordered per destination. A receiver accepts a link or segment range only at
its current consumption point, so a later message overtaking an earlier one is refused
(409, "not yet") and would only cost a round trip and a backoff. Hence:

* one sender per destination at a time, across every worker process: the lease
  ``outbox:<destination>`` (:mod:`keystrata.storage.leases`), taken in the same
  transaction that claims the destination's messages and given up when their answers
  are recorded;
* the oldest message of a destination (its *head*) decides when the destination is
  due: while it backs off after a refusal, every later message to that destination
  waits too (it would be refused the same way). A head that is refused for good keeps
  its destination blocked, visibly: ``attempts`` and ``last_error`` on its row, the
  age of the oldest message per destination in the metrics, and a warning in the log
  (``peering/sender.py``). Nothing is skipped or dropped: the two sides of a segment
  must not drift apart.

A commit that enqueued a message wakes the outbox loop of its own process at once
(:func:`wake_on_commit`); other processes notice it on their next poll.
"""

from __future__ import annotations

import hashlib
import json
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import datetime, timedelta
from functools import cached_property
from typing import Any

from sqlalchemy import Engine, delete, event, func, or_, select, update
from sqlalchemy.orm import Session

from keystrata.peering.messages import PeerMessage
from keystrata.storage import leases
from keystrata.storage.db import Database
from keystrata.storage.models import OutboxMessage

#: How long a worker may hold a claimed message before another may take it over.
CLAIM = timedelta(seconds=30)

#: Flag in ``Session.info``: this transaction enqueued a message.
_ENQUEUED = "keystrata.outbox.enqueued"


@dataclass(frozen=True)
class Pending:
    id: int
    destination: str
    kind: str
    segment_id: str | None
    #: The body as stored (JSON): sent as it is, parsed only when asked for.
    raw: bytes
    attempts: int

    @cached_property
    def body(self) -> dict[str, Any]:
        value: dict[str, Any] = json.loads(self.raw)
        return value


def send(
    session: Session,
    *,
    destination: str,
    message: PeerMessage,
    segment_id: str | None,
    now: datetime,
) -> None:
    """Queue a typed message in the session's transaction (sent after commit; the commit
    wakes this process's outbox loop). The one way services send to peers."""
    body = message.to_body()
    enqueue(
        session,
        destination=destination,
        kind=body["kind"],
        segment_id=segment_id,
        body=body,
        now=now,
    )


def enqueue(
    session: Session,
    *,
    destination: str,
    kind: str,
    segment_id: str | None,
    body: Mapping[str, Any],
    now: datetime,
) -> None:
    """Queue a raw body (``kind`` added in front). For the outbox's own mechanics and
    their tests; services send typed messages with :func:`send`."""
    session.info[_ENQUEUED] = True
    session.add(
        OutboxMessage(
            destination=destination,
            kind=kind,
            segment_id=segment_id,
            body=json.dumps({"kind": kind, **body}, separators=(",", ":")).encode(),
            attempts=0,
            due_at=now,
            claimed_until=None,
            last_error=None,
            created_at=now,
        )
    )


def claim(db: Database, *, now: datetime, limit: int = 64) -> list[Pending]:
    """Claim up to ``limit`` due messages of any destination, oldest first.

    Not ordered per destination and blind to the destination leases: for tests and
    tools that carry messages by hand (``tests/relaynet.py``). The worker uses
    :func:`claim_next`."""
    with db.write() as s:
        ids = list(
            s.execute(
                select(OutboxMessage.id)
                .where(
                    OutboxMessage.due_at <= now,
                    or_(OutboxMessage.claimed_until.is_(None), OutboxMessage.claimed_until < now),
                )
                .order_by(OutboxMessage.id)
                .limit(limit)
                .with_for_update(skip_locked=True)
            ).scalars()
        )
        if not ids:
            return []
        s.execute(
            update(OutboxMessage).where(OutboxMessage.id.in_(ids)).values(claimed_until=now + CLAIM)
        )
        rows = (
            s.execute(
                select(OutboxMessage).where(OutboxMessage.id.in_(ids)).order_by(OutboxMessage.id)
            )
            .scalars()
            .all()
        )
        return [
            Pending(r.id, r.destination, r.kind, r.segment_id, bytes(r.body), r.attempts)
            for r in rows
        ]


def delivered(db: Database, ids: list[int]) -> None:
    """Forget messages their receiver acknowledged."""
    if ids:
        with db.write() as s:
            s.execute(delete(OutboxMessage).where(OutboxMessage.id.in_(ids)))


def pending_bodies(db: Database, *, destination: str, kind: str) -> list[dict[str, Any]]:
    """Bodies of messages of ``kind`` still waiting for ``destination``, oldest first
    (a peer may pull them when it needs one before the outbox delivers it)."""
    with db.read() as s:
        rows = s.execute(
            select(OutboxMessage.body)
            .where(OutboxMessage.destination == destination, OutboxMessage.kind == kind)
            .order_by(OutboxMessage.id)
        ).scalars()
        return [json.loads(b) for b in rows]


# ---------------------------------------------------------------- ordered delivery


def lease_name(destination: str) -> str:
    """The lease that makes one worker the only sender to ``destination``. Node IDs have
    up to 64 characters, lease names too: a long ID is named by its SHA-256 instead."""
    name = f"outbox:{destination}"
    if len(name) <= 64:
        return name
    return "outbox#" + hashlib.sha256(destination.encode()).hexdigest()[:57]


def due_destinations(db: Database, *, now: datetime) -> list[str]:
    """Destinations whose oldest message is due and not claimed, oldest first."""
    heads = select(func.min(OutboxMessage.id)).group_by(OutboxMessage.destination)
    with db.read() as s:
        return list(
            s.execute(
                select(OutboxMessage.destination)
                .where(
                    OutboxMessage.id.in_(heads),
                    OutboxMessage.due_at <= now,
                    or_(OutboxMessage.claimed_until.is_(None), OutboxMessage.claimed_until < now),
                )
                .order_by(OutboxMessage.id)
            ).scalars()
        )


def claim_next(
    db: Database,
    destination: str,
    *,
    holder: str,
    now: datetime,
    limit: int,
    max_bytes: int,
    ttl: timedelta = CLAIM,
) -> list[Pending]:
    """Take the destination's lease for ``holder`` and claim its oldest messages, in id
    order: at most ``limit`` of them and ``max_bytes`` of bodies (always at least one).

    Returns [] (and holds no lease) when another worker holds the lease, when the head
    is not due, or when any of those messages still carries a live claim (a sender
    whose lease ran out while it was still sending: wait for its claim to end too).
    Hold the lease until :func:`settle`; ``ttl`` must outlast the request.
    """
    name = lease_name(destination)
    with db.write() as s:
        if not leases.take(s, name, holder, now=now, ttl=ttl):
            return []
        rows = s.execute(
            select(
                OutboxMessage.id,
                OutboxMessage.due_at,
                OutboxMessage.claimed_until,
                func.length(OutboxMessage.body),
            )
            .where(OutboxMessage.destination == destination)
            .order_by(OutboxMessage.id)
            .limit(limit)
        ).all()
        ids: list[int] = []
        size = 0
        for row_id, _due, claimed_until, length in rows:
            if claimed_until is not None and claimed_until >= now:
                ids = []
                break
            if ids and size + int(length) > max_bytes:
                break
            ids.append(row_id)
            size += int(length)
        if not ids or rows[0][1] > now:
            leases.release(s, name, holder)
            return []
        s.execute(
            update(OutboxMessage).where(OutboxMessage.id.in_(ids)).values(claimed_until=now + ttl)
        )
        bodies = s.execute(
            select(OutboxMessage).where(OutboxMessage.id.in_(ids)).order_by(OutboxMessage.id)
        ).scalars()
        return [
            Pending(r.id, r.destination, r.kind, r.segment_id, bytes(r.body), r.attempts)
            for r in bodies
        ]


def backoff(attempts: int, cap: timedelta) -> timedelta:
    """Wait before the next attempt at a message refused ``attempts`` times before:
    0.25 s doubling per refusal, up to ``cap``."""
    return min(cap, timedelta(seconds=0.25 * 2 ** min(attempts, 10)))


def settle(
    db: Database,
    claimed: list[Pending],
    *,
    holder: str,
    now: datetime,
    acknowledged: int,
    error: str | None,
    max_backoff: timedelta,
) -> None:
    """Record the answers to a claimed run of one destination's messages and give the
    destination's lease up, in one transaction.

    The first ``acknowledged`` messages are forgotten. If ``error`` is set, the next one
    was refused: it backs off (its ``due_at`` holds the whole destination back) and keeps
    the error; the rest were not attempted and are only released.
    """
    if not claimed:
        return
    done = [m.id for m in claimed[:acknowledged]]
    rest = claimed[acknowledged:]
    with db.write() as s:
        if done:
            s.execute(delete(OutboxMessage).where(OutboxMessage.id.in_(done)))
        if rest and error is not None:
            head = rest[0]
            s.execute(
                update(OutboxMessage)
                .where(OutboxMessage.id == head.id)
                .values(
                    attempts=OutboxMessage.attempts + 1,
                    due_at=now + backoff(head.attempts, max_backoff),
                    claimed_until=None,
                    last_error=error[:255],
                )
            )
            rest = rest[1:]
        if rest:
            s.execute(
                update(OutboxMessage)
                .where(OutboxMessage.id.in_([m.id for m in rest]))
                .values(claimed_until=None)
            )
        leases.release(s, lease_name(claimed[0].destination), holder)


# ---------------------------------------------------------------- wake on commit

_wakers: list[tuple[Engine, threading.Event]] = []
_wakers_lock = threading.Lock()


def wake_on_commit(db: Database, wake: threading.Event) -> Callable[[], None]:
    """Set ``wake`` whenever a transaction of this process on ``db`` that enqueued a
    message commits. Returns the function that stops it."""
    entry = (db.engine, wake)
    with _wakers_lock:
        _wakers.append(entry)

    def stop() -> None:
        with _wakers_lock:
            if entry in _wakers:
                _wakers.remove(entry)

    return stop


@event.listens_for(Session, "after_commit")
def _after_commit(session: Session) -> None:
    if not session.info.pop(_ENQUEUED, False):
        return
    bind = session.bind
    pool = getattr(bind, "pool", None)  # an engine with options shares its engine's pool
    with _wakers_lock:
        for engine, wake in _wakers:
            if pool is None or engine.pool is pool:
                wake.set()


@event.listens_for(Session, "after_rollback")
def _after_rollback(session: Session) -> None:
    session.info.pop(_ENQUEUED, None)
