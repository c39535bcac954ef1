"""The auditor's reads of the ledger: entries by index, and search by time, event and
what entries name."""

from __future__ import annotations

import base64
import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from sqlalchemy import Select, select

from keystrata.context import NodeContext
from keystrata.ledger.entries import Event, Ref
from keystrata.storage.models import LedgerEntry, LedgerRef

MAX_PAGE = 1000


@dataclass(frozen=True)
class Filters:
    """Every filter narrows the result (AND); within ``events`` any one matches."""

    since: datetime | None = None
    until: datetime | None = None
    events: Sequence[Event] = ()
    refs: Sequence[tuple[Ref, str]] = field(default=())


def exported(index: int, entry: bytes) -> dict[str, Any]:
    """An entry as the API and exports show it: index, canonical bytes, decoded object.

    Stored bytes that do not decode (a damaged or altered row) are shown as they are,
    with ``entry`` null, so a verifier can name them instead of the export failing.
    """
    try:
        decoded = json.loads(entry)
    except ValueError:
        decoded = None
    return {"index": index, "entry_b64": base64.b64encode(entry).decode(), "entry": decoded}


def entries(ctx: NodeContext, start: int, stop: int) -> list[dict[str, Any]]:
    """Entries ``start <= index < stop``, oldest first, as :func:`exported` shows them."""
    with ctx.db.read() as s:
        rows = s.execute(
            select(LedgerEntry.idx, LedgerEntry.entry)
            .where(LedgerEntry.idx >= start, LedgerEntry.idx < stop)
            .order_by(LedgerEntry.idx)
        ).all()
    return [exported(int(i), bytes(e)) for i, e in rows]


def _query(filters: Filters, after: int | None) -> Select[int, bytes]:
    query = select(LedgerEntry.idx, LedgerEntry.entry)
    if after is not None:
        query = query.where(LedgerEntry.idx > after)
    if filters.since is not None:
        query = query.where(LedgerEntry.recorded_at >= filters.since)
    if filters.until is not None:
        query = query.where(LedgerEntry.recorded_at < filters.until)
    if filters.events:
        query = query.where(LedgerEntry.event.in_([str(e) for e in filters.events]))
    for kind, value in filters.refs:
        named = select(LedgerRef.idx).where(LedgerRef.kind == str(kind), LedgerRef.value == value)
        query = query.where(LedgerEntry.idx.in_(named))
    return query.order_by(LedgerEntry.idx)


def search(
    ctx: NodeContext, filters: Filters, *, after: int | None = None, limit: int = 100
) -> tuple[list[dict[str, Any]], int | None]:
    """Entries matching ``filters`` with index above ``after``, oldest first.

    Returns the page and the cursor for the next page (the last index returned), or None
    when this page is the last.
    """
    limit = max(1, min(limit, MAX_PAGE))
    with ctx.db.read() as s:
        rows = s.execute(_query(filters, after).limit(limit + 1)).all()
    page = [exported(int(i), bytes(e)) for i, e in rows[:limit]]
    return page, (page[-1]["index"] if len(rows) > limit else None)
