"""Named leases in the database: one holder at a time across processes and workers."""

from __future__ import annotations

import os
import secrets
import socket
from datetime import datetime, timedelta

from sqlalchemy import delete, or_, update
from sqlalchemy.orm import Session

from keystrata.storage.db import Database, upsert_insert
from keystrata.storage.models import Lease


def new_holder() -> str:
    """A holder name no other loop shares: this host, this process and a random tag.
    Each background loop set (and each caller without one) takes its own."""
    return f"{socket.gethostname()}:{os.getpid()}:{secrets.token_hex(4)}"


def acquire(db: Database, name: str, holder: str, *, now: datetime, ttl: timedelta) -> bool:
    """Take or renew lease ``name`` for ``holder`` until ``now + ttl``.

    Returns True when ``holder`` holds the lease afterwards: it was free, expired, or
    already ``holder``'s. The conditional UPDATE runs under the row lock (and SQLite's
    write lock), so two workers can never both succeed.
    """
    with db.write() as s:
        return take(s, name, holder, now=now, ttl=ttl)


def take(session: Session, name: str, holder: str, *, now: datetime, ttl: timedelta) -> bool:
    """Take or renew lease ``name`` inside the caller's write transaction.

    The same rule as :func:`acquire`, in one transaction so that the caller can claim
    what the lease guards in the same commit. A missing row is created with ``INSERT ...
    ON CONFLICT DO NOTHING``: a concurrent creator makes this one insert nothing (on
    PostgreSQL after waiting for the other's commit) instead of failing the transaction.
    """
    taken = session.execute(  # type: ignore[attr-defined]
        update(Lease)
        .where(Lease.name == name, or_(Lease.holder == holder, Lease.expires_at < now))
        .values(holder=holder, expires_at=now + ttl)
    ).rowcount
    if taken:
        return True
    dialect_insert = upsert_insert(session.get_bind().dialect.name)
    # RETURNING, not rowcount: SQLAlchemy reports -1 (unknown) as the rowcount of this
    # statement on PostgreSQL, which bool() took for "created" while another held it.
    created = session.execute(
        dialect_insert(Lease)
        .values(name=name, holder=holder, expires_at=now + ttl)
        .on_conflict_do_nothing(index_elements=["name"])
        .returning(Lease.name)
    ).first()
    return created is not None


def release(session: Session, name: str, holder: str) -> None:
    """Give lease ``name`` up (in the caller's transaction) if ``holder`` holds it."""
    session.execute(delete(Lease).where(Lease.name == name, Lease.holder == holder))
