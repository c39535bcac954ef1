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

from sqlalchemy import select

from keystrata.clock import Clock, SystemClock
from keystrata.crypto.hazmat import Keyring, kek_id
from keystrata.domain.ledger import Event
from keystrata.errors import StartupRefused
from keystrata.services import ledger
from keystrata.services.node import ROTATION_MARK, check_kek
from keystrata.storage.db import Database
from keystrata.storage.models import LinkBlock, NodeMeta
from keystrata.storage.sealed import SEALED_META, block_context, meta_context


@dataclass(frozen=True)
class RotationReport:
    resealed_blocks: int
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
            ledger.append(
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
    done_before = 0
    blocks = 0
    last_seq = 0
    while True:
        with db.write() as s:
            rows = (
                s.execute(
                    select(LinkBlock)
                    .where(LinkBlock.seq > last_seq, LinkBlock.sealed.is_not(None))
                    .order_by(LinkBlock.seq)
                    .limit(batch)
                )
                .scalars()
                .all()
            )
            if not rows:
                break
            for row in rows:
                assert row.sealed is not None
                if Keyring.sealed_kek_id(row.sealed) == target:
                    done_before += 1
                    continue
                ctx = block_context(row.link_id, row.block_id, row.used)
                row.sealed = both.seal(both.open(row.sealed, ctx), ctx)
                blocks += 1
            last_seq = rows[-1].seq
        if progress:
            progress(blocks + done_before)
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
        ledger.append(
            s,
            node_id=node_id,
            at=clock.now(),
            event=Event.KEK_ROTATED,
            fields={"to_kek": target.hex(), "resealed_blocks": blocks, "resealed_values": meta},
        )
    return RotationReport(resealed_blocks=blocks, resealed_meta=meta, already_done=done_before)
