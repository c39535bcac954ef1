"""Appending to the ledger inside the caller's transaction (fail closed: if the entry
cannot be written, the transaction, and so the change it records, is rolled back)."""

from __future__ import annotations

from collections.abc import Mapping
from datetime import datetime
from typing import Any

from sqlalchemy import insert, update
from sqlalchemy.orm import Session

from keystrata.domain.ledger import Event, encode_entry
from keystrata.storage.models import LedgerEntry, LedgerHead


def append(
    session: Session, *, node_id: str, at: datetime, event: Event, fields: Mapping[str, Any]
) -> int:
    """Append one entry in the session's transaction and return its index.

    The update of the single ``ledger_head`` row takes its lock until commit, so
    concurrent appenders get consecutive indexes with no gaps.
    """
    size = session.execute(
        update(LedgerHead)
        .where(LedgerHead.id == 1)
        .values(size=LedgerHead.size + 1)
        .returning(LedgerHead.size)
    ).scalar_one()
    index = size - 1
    entry = encode_entry(index=index, event=event, node_id=node_id, at=at, fields=fields)
    session.execute(
        insert(LedgerEntry).values(idx=index, recorded_at=at, event=str(event), entry=entry)
    )
    return int(index)
