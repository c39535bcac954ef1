"""Small helpers shared by tests."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select

from keystrata.context import NodeContext
from keystrata.storage.models import Base


def snapshot(ctx: NodeContext) -> dict[str, list[tuple[Any, ...]]]:
    """Every row of every table, for "this request changed nothing" checks."""
    out: dict[str, list[tuple[Any, ...]]] = {}
    with ctx.db.read() as s:
        for table in Base.metadata.sorted_tables:
            rows = s.execute(select(table)).all()
            out[table.name] = sorted(tuple(r) for r in rows)
    return out


def ledger_events(ctx: NodeContext) -> list[str]:
    from keystrata.storage.models import LedgerEntry

    with ctx.db.read() as s:
        return list(s.execute(select(LedgerEntry.event).order_by(LedgerEntry.idx)).scalars())
