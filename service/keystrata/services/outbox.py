"""Transactional outbox: messages to peer nodes are written in the transaction that
decides to send them, and delivered afterwards with retries and backoff. Receivers are
idempotent by segment ID, so a crash or a lost reply only causes a resend."""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import delete, or_, select, update
from sqlalchemy.orm import Session

from keystrata.storage.db import Database
from keystrata.storage.models import OutboxMessage

#: How long a worker may hold a claimed message before another may take it over.
CLAIM = timedelta(seconds=30)


@dataclass(frozen=True)
class Pending:
    id: int
    destination: str
    kind: str
    segment_id: str | None
    body: dict[str, Any]
    attempts: int


def enqueue(
    session: Session,
    *,
    destination: str,
    kind: str,
    segment_id: str | None,
    body: Mapping[str, Any],
    now: datetime,
) -> None:
    """Add a message in the session's transaction (sent after commit)."""
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
    """Claim up to ``limit`` due messages, oldest first, for this worker."""
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
            Pending(r.id, r.destination, r.kind, r.segment_id, json.loads(r.body), r.attempts)
            for r in rows
        ]


def delivered(db: Database, ids: list[int]) -> None:
    """Forget messages their receiver acknowledged."""
    if ids:
        with db.write() as s:
            s.execute(delete(OutboxMessage).where(OutboxMessage.id.in_(ids)))


def retry_later(
    db: Database,
    message: Pending,
    *,
    now: datetime,
    error: str,
    max_backoff: timedelta = timedelta(seconds=30),
) -> None:
    """Release a message for another attempt after an exponential backoff."""
    wait = min(max_backoff, timedelta(seconds=0.25 * 2 ** min(message.attempts, 10)))
    with db.write() as s:
        s.execute(
            update(OutboxMessage)
            .where(OutboxMessage.id == message.id)
            .values(
                attempts=OutboxMessage.attempts + 1,
                due_at=now + wait,
                claimed_until=None,
                last_error=error[:255],
            )
        )


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
