"""Link key ingest: blocks from a QKD module, sealed at rest, recorded in the ledger.

A block re-sent with the same bytes is a harmless duplicate. A block ID re-sent with
different bytes refuses the whole request (nothing of it is stored) and is recorded as a
refusal. Re-sends are recognised by a keyed fingerprint (HMAC under a sealed node
secret), so no bytes need to be kept in the clear and consumed blocks are still known.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from sqlalchemy import insert, select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.crypto.hazmat import constant_time_equal, keyed_fingerprint
from keystrata.errors import BlockConflict, Forbidden, InvalidInput, NotFound
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.links.blocks import BlockIn, validate_block
from keystrata.links.pools import ends_here
from keystrata.storage.models import LinkBlock, QkdLink
from keystrata.storage.sealed import block_context

# Ledger entries list the block IDs of a request up to this many; beyond it they give
# the first and last ID and the count (the blocks themselves carry every ID).
LEDGER_ID_LIST_MAX = 256
#: Blocks sealed and inserted per statement (at 4 KiB blocks, 1 MiB of sealed copies).
INSERT_SLICE_BLOCKS = 256


@dataclass(frozen=True)
class IngestResult:
    link_id: str
    accepted: int
    duplicates: int
    accepted_bits: int


def _fingerprint(ctx: NodeContext, link_id: str, block: BlockIn) -> bytes:
    return keyed_fingerprint(
        ctx.fingerprint_key, link_id.encode(), block.block_id.encode(), block.key
    )


def ingest(
    ctx: NodeContext, link_id: str, blocks: list[BlockIn], *, actor: str, actor_link: str | None
) -> IngestResult:
    """Store a batch of blocks for ``link_id`` in one transaction.

    Raises:
        InvalidInput: a block fails validation (nothing is stored).
        NotFound: no active link with this ID ends at this node.
        Forbidden: the calling module belongs to another link.
        BlockConflict: a block ID already known with different bytes (recorded).
    """
    if actor_link != link_id:
        raise Forbidden("this QKD module is provisioned for another link")
    if not blocks:
        raise InvalidInput("blocks: give at least one block")
    now = ctx.clock.now()
    problems = []
    for i, block in enumerate(blocks):
        problems += validate_block(
            block, where=f"blocks.{i}", max_block_bytes=ctx.settings.ingest.max_block_bytes, now=now
        )
    if problems:
        raise InvalidInput(
            "; ".join(f"{p['field']}: {p['problem']}" for p in problems[:5]), details=problems
        )
    prints = [_fingerprint(ctx, link_id, b) for b in blocks]
    try:
        with ctx.db.write() as s:
            return _store(ctx, s, link_id, blocks, prints, actor=actor)
    except BlockConflict as exc:
        with ctx.db.write() as s:
            chain.append(
                s,
                node_id=ctx.node_id,
                at=now,
                event=Event.LINK_KEY_REFUSED,
                fields={
                    "link": link_id,
                    "actor": actor,
                    "reason": "block_conflict",
                    "block_ids": [d["block_id"] for d in exc.details][:16],
                },
            )
        raise


def _store(
    ctx: NodeContext,
    s: Session,
    link_id: str,
    blocks: list[BlockIn],
    prints: list[bytes],
    *,
    actor: str,
) -> IngestResult:
    link = s.get(QkdLink, link_id)
    if link is None or link.retired_at is not None or not ends_here(ctx, link):
        raise NotFound(f"no active QKD link {link_id!r} ends at this node")
    ids = [b.block_id for b in blocks]
    known = dict(
        s.execute(
            select(LinkBlock.block_id, LinkBlock.fingerprint).where(
                LinkBlock.link_id == link_id, LinkBlock.block_id.in_(set(ids))
            )
        ).all()
    )
    conflicts: list[str] = []
    fresh: dict[str, tuple[BlockIn, bytes]] = {}
    duplicates = 0
    for block, fp in zip(blocks, prints, strict=True):
        # Compare with what is stored, or with an earlier copy in this same request.
        seen = known.get(block.block_id)
        if seen is None and block.block_id in fresh:
            seen = fresh[block.block_id][1]
        if seen is None:
            fresh[block.block_id] = (block, fp)
        elif constant_time_equal(seen, fp):
            duplicates += 1
        else:
            conflicts.append(block.block_id)
    if conflicts:
        raise BlockConflict(
            f"{len(conflicts)} block ID(s) were already received with different key bytes; "
            "nothing from this request was stored",
            details=[{"block_id": b} for b in conflicts[:16]],
        )
    now = ctx.clock.now()
    fresh_blocks = list(fresh.values())
    bits = 0
    # Sealed in slices, each inserted before the next is sealed (same transaction, so
    # still all or nothing), so a 16 MiB batch never holds a sealed copy of every block and
    # the statement's parameters for all of them at once beside the request body.
    for i in range(0, len(fresh_blocks), INSERT_SLICE_BLOCKS):
        rows: list[dict[str, Any]] = [
            {
                "link_id": link_id,
                "block_id": b.block_id,
                "length": len(b.key),
                "used": 0,
                "qber": b.qber,
                "epsilon": b.epsilon,
                "produced_at": b.produced_at,
                "received_at": now,
                "fingerprint": fp,
                "sealed": ctx.keyring.seal(b.key, block_context(link_id, b.block_id, 0)),
            }
            for b, fp in fresh_blocks[i : i + INSERT_SLICE_BLOCKS]
        ]
        s.execute(insert(LinkBlock), rows)
        bits += 8 * sum(r["length"] for r in rows)
        del rows
    new_ids = list(fresh)
    fields: dict[str, object] = {
        "link": link_id,
        "actor": actor,
        "blocks": len(fresh_blocks),
        "bits": bits,
        "duplicates": duplicates,
    }
    if len(new_ids) <= LEDGER_ID_LIST_MAX:
        fields["block_ids"] = new_ids
    else:
        fields |= {"first_block_id": new_ids[0], "last_block_id": new_ids[-1]}
    chain.append(s, node_id=ctx.node_id, at=now, event=Event.LINK_KEY_INGESTED, fields=fields)
    return IngestResult(
        link_id=link_id, accepted=len(fresh_blocks), duplicates=duplicates, accepted_bits=bits
    )
