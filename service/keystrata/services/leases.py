"""Named leases in the database: one holder at a time across processes and workers."""

from __future__ import annotations

from datetime import datetime, timedelta

from sqlalchemy import insert, or_, update
from sqlalchemy.exc import IntegrityError

from keystrata.storage.db import Database
from keystrata.storage.models import Lease


def acquire(db: Database, name: str, holder: str, *, now: datetime, ttl: timedelta) -> bool:
    """Take or renew lease ``name`` for ``holder`` until ``now + ttl``.

    Returns True when ``holder`` holds the lease afterwards: it was free, expired, or
    already ``holder``'s. The conditional UPDATE runs under the row lock (and SQLite's
    write lock), so two workers can never both succeed.
    """
    with db.write() as s:
        taken = s.execute(  # type: ignore[attr-defined]
            update(Lease)
            .where(Lease.name == name, or_(Lease.holder == holder, Lease.expires_at < now))
            .values(holder=holder, expires_at=now + ttl)
        ).rowcount
        if taken:
            return True
        if s.get(Lease, name) is not None:
            return False
    try:
        with db.write() as s:
            s.execute(insert(Lease).values(name=name, holder=holder, expires_at=now + ttl))
        return True
    except IntegrityError:
        return False  # another worker created it first


def holder_of(db: Database, name: str) -> str | None:
    with db.read() as s:
        lease = s.get(Lease, name)
        return None if lease is None else lease.holder
