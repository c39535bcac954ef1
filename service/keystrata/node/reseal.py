"""Move sealed pair key from layout 1 (row identity only) to layout 2 (row identity and
its authorisation fields: pair, side, partner, owner, length; master, slaves, size), see
:mod:`keystrata.storage.sealed`.

Runs when a node opens a database whose ``node_meta.seal_layout`` is not 2 (a database
sealed under layout 1), in batches of one transaction each. It is resumable
and safe to run twice or from two workers at once: a row that already opens under
layout 2 is left alone, one that opens under layout 1 is sealed again under layout 2,
and a row that opens under neither stops the node (a tampered row).
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from typing import Any

from sqlalchemy import select

from keystrata.crypto.hazmat import Keyring
from keystrata.errors import SealBroken, StartupRefused
from keystrata.storage.db import Database
from keystrata.storage.models import KeyAlloc, NodeMeta, PairSegment
from keystrata.storage.sealed import (
    LAYOUT,
    LAYOUT_META,
    key_context,
    legacy_key_context,
    legacy_segment_context,
    segment_context,
)

log = logging.getLogger("keystrata.node")


def mark_current(db: Database) -> None:
    """Record that every sealed value is in the current layout (a new database)."""
    with db.write() as s:
        row = s.get(NodeMeta, LAYOUT_META)
        if row is None:
            s.add(NodeMeta(name=LAYOUT_META, value=str(LAYOUT).encode()))
        else:
            row.value = str(LAYOUT).encode()


def is_current(db: Database) -> bool:
    with db.read() as s:
        row = s.get(NodeMeta, LAYOUT_META)
    return row is not None and row.value == str(LAYOUT).encode()


def reseal(db: Database, keyring: Keyring, *, batch: int = 500) -> int:
    """Bring every sealed segment and waiting key to the current layout; returns how many
    rows were sealed again. Raises StartupRefused for a row that opens under neither."""
    if is_current(db):
        return 0
    moved = _move(
        db,
        keyring,
        batch,
        model=PairSegment,
        key=PairSegment.segment_id,
        new=lambda r: segment_context(r, r.used),
        old=lambda r: legacy_segment_context(r.segment_id, r.used),
    )
    moved += _move(
        db,
        keyring,
        batch,
        model=KeyAlloc,
        key=KeyAlloc.key_id,
        new=key_context,
        old=lambda r: legacy_key_context(r.key_id),
    )
    mark_current(db)
    if moved:
        log.warning("sealed pair key moved to layout %d: %d rows", LAYOUT, moved)
    return moved


def _move(
    db: Database,
    keyring: Keyring,
    batch: int,
    *,
    model: Any,
    key: Any,
    new: Callable[[Any], bytes],
    old: Callable[[Any], bytes],
) -> int:
    moved = 0
    last: Any = None
    while True:
        with db.write() as s:
            query = (
                select(model)
                .where(model.sealed.is_not(None))
                .order_by(key)
                .limit(batch)
                .with_for_update()
            )
            if last is not None:
                query = query.where(key > last)
            rows = s.execute(query).scalars().all()
            if not rows:
                return moved
            for row in rows:
                try:
                    keyring.open(row.sealed, new(row))
                    continue
                except SealBroken:
                    pass
                try:
                    value = keyring.open(row.sealed, old(row))
                except SealBroken:
                    raise StartupRefused(
                        f"a sealed {model.__tablename__} row opens under no layout: "
                        "it was altered outside keystrata"
                    ) from None
                row.sealed = keyring.seal(value, new(row))
                moved += 1
            last = getattr(rows[-1], key.key)
