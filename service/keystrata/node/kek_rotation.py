"""Key-encryption-key rotation: re-seal every sealed row under a new KEK, resumably.

The rotation runs with the node stopped. It first records which KEK it is moving to,
then re-seals rows in batches (one transaction each), skipping rows already under the
new KEK, so an interrupted run is finished by running it again. The last step re-seals
the KEK check value and writes the ledger entry; from then on only the new KEK opens the
database, and the node's ``[kek] file`` must point to it.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from sqlalchemy import select

from keystrata.clock import Clock, SystemClock
from keystrata.crypto.hazmat import Keyring, kek_id
from keystrata.errors import StartupRefused
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.node.lifecycle import ROTATION_MARK, check_kek
from keystrata.storage.db import Database
from keystrata.storage.models import KeyAlloc, LinkBlock, NodeMeta, PairSegment
from keystrata.storage.sealed import (
    SEALED_META,
    block_context,
    key_context,
    meta_context,
    segment_context,
)


@dataclass(frozen=True)
class RotationReport:
    resealed_blocks: int
    #: Pair key: segments, and keys waiting at a slave's station.
    resealed_segments: int
    resealed_meta: int
    already_done: int


def rotate(
    db: Database,
    node_id: str,
    old: bytes,
    new: bytes,
    *,
    batch: int = 500,
    clock: Clock | None = None,
    progress: Callable[[int], None] | None = None,
) -> RotationReport:
    """Re-seal every sealed value under ``new``. Safe to run again after an interruption.

    Raises:
        StartupRefused: ``old`` does not open this database, or a rotation to another
            KEK is already in progress.
    """
    clock = clock or SystemClock()
    both = Keyring(new, [old])
    target = kek_id(new)
    with db.write() as s:
        mark = s.get(NodeMeta, ROTATION_MARK)
        if mark is None:
            check_kek(s, Keyring(old))
            s.add(NodeMeta(name=ROTATION_MARK, value=target))
            chain.append(
                s,
                node_id=node_id,
                at=clock.now(),
                event=Event.KEK_ROTATION_STARTED,
                fields={"to_kek": target.hex()},
            )
        elif mark.value != target:
            raise StartupRefused(
                "a rotation to another key-encryption key is in progress; "
                "finish it with that key first"
            )
    blocks, done_before = _reseal_all(
        db,
        both,
        target,
        batch,
        progress,
        model=LinkBlock,
        key=LinkBlock.seq,
        context=lambda r: block_context(r.link_id, r.block_id, r.used),
    )
    segments, done_segments = _reseal_all(
        db,
        both,
        target,
        batch,
        progress,
        model=PairSegment,
        key=PairSegment.segment_id,
        context=lambda r: segment_context(r, r.used),
    )
    keys, done_keys = _reseal_all(
        db,
        both,
        target,
        batch,
        progress,
        model=KeyAlloc,
        key=KeyAlloc.key_id,
        context=key_context,
    )
    done_before += done_segments + done_keys
    segments += keys  # keys waiting for their slaves are pair key too
    meta = 0
    with db.write() as s:
        for name in SEALED_META:
            meta_row = s.get(NodeMeta, name)
            if meta_row is None or Keyring.sealed_kek_id(meta_row.value) == target:
                continue
            ctx = meta_context(name)
            meta_row.value = both.seal(both.open(meta_row.value, ctx), ctx)
            meta += 1
        mark = s.get(NodeMeta, ROTATION_MARK)
        if mark is not None:
            s.delete(mark)
        chain.append(
            s,
            node_id=node_id,
            at=clock.now(),
            event=Event.KEK_ROTATED,
            fields={"to_kek": target.hex(), "resealed_blocks": blocks, "resealed_values": meta},
        )
    return RotationReport(
        resealed_blocks=blocks,
        resealed_segments=segments,
        resealed_meta=meta,
        already_done=done_before,
    )


def _reseal_all(
    db: Database,
    both: Keyring,
    target: bytes,
    batch: int,
    progress: Callable[[int], None] | None,
    *,
    model: Any,
    key: Any,
    context: Callable[[Any], bytes],
) -> tuple[int, int]:
    """Re-seal every sealed row of ``model`` in batches ordered by ``key``.

    Returns (rows re-sealed now, rows found already under the new KEK).
    """
    resealed = already = 0
    last: Any = None
    while True:
        with db.write() as s:
            query = select(model).where(model.sealed.is_not(None)).order_by(key).limit(batch)
            if last is not None:
                query = query.where(key > last)
            rows = s.execute(query).scalars().all()
            if not rows:
                return resealed, already
            for row in rows:
                if Keyring.sealed_kek_id(row.sealed) == target:
                    already += 1
                    continue
                ctx = context(row)
                row.sealed = both.seal(both.open(row.sealed, ctx), ctx)
                resealed += 1
            last = getattr(rows[-1], key.key)
        if progress:
            progress(resealed + already)
