"""Reading and destroying link key bytes, shared by the relay and the stations.

Both ends of a QKD link consume each block from its front: the relay decides which
bytes a relay operation uses, and the station applies the same ranges later. A range
must start exactly where its block's consumption stands (``offset == used``):

* ``offset > used``: an earlier operation on this block has not been applied here yet
  (its message is still on its way), so the caller retries later;
* ``offset < used``: those bytes were used already; applying the range would reuse
  link key, so it is refused.

Taking bytes destroys them in the caller's transaction (:mod:`keystrata.storage.front`):
the block's remaining bytes are re-sealed from the new offset (or the sealed value is
dropped when nothing is left).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

from sqlalchemy import bindparam, func, select, update
from sqlalchemy.orm import Session

from keystrata.crypto.hazmat import Keyring
from keystrata.errors import LinkKeyReused, OutOfOrder
from keystrata.ranges import Available, Range
from keystrata.storage.front import Front, Refusals, block_front
from keystrata.storage.models import LinkBlock

#: Consumption point and sealed remainder of one block, by its primary key (executed on
#: the session's connection: a plain executemany, not the ORM's bulk update).
_UPDATE_TAKEN = (
    update(LinkBlock)
    .where(LinkBlock.seq == bindparam("b_seq"))
    .values(used=bindparam("b_used"), sealed=bindparam("b_sealed"))
)

#: Errors for a range not at the front of its block.
_REFUSALS = Refusals(
    ahead=lambda r, used: OutOfOrder(
        f"not yet: block {r.buffer_id} is consumed up to byte {used} here"
    ),
    behind=lambda r, used: LinkKeyReused(),
    outside=lambda r, used: LinkKeyReused("refused: a range lies outside its block"),
)

#: Blocks read per query by :func:`available`. A segment of the default size takes
#: about 65 blocks of 4 KiB, so one page usually suffices; a larger segment reads a few.
PAGE_BLOCKS = 128


def available(session: Session, link_id: str, limit_bytes: int) -> list[Available]:
    """Blocks of ``link_id`` with unused bytes, oldest first, until ``limit_bytes``.

    Reads the blocks in pages (keyset on ``seq``, the order of the partial index
    ``ix_link_block_available``) so that a relay operation reads the few blocks it will
    take, not every unused block of the link: the cost of a segment does not grow with
    the pool.
    """
    out: list[Available] = []
    have = 0
    after: int | None = None
    while True:
        query = (
            select(
                LinkBlock.seq,
                LinkBlock.block_id,
                LinkBlock.used,
                LinkBlock.length,
                LinkBlock.epsilon,
            )
            .where(LinkBlock.link_id == link_id, LinkBlock.used < LinkBlock.length)
            .order_by(LinkBlock.seq)
            .limit(PAGE_BLOCKS)
        )
        if after is not None:
            query = query.where(LinkBlock.seq > after)
        rows = session.execute(query).all()
        for seq, block_id, used, length, epsilon in rows:
            out.append(Available(block_id, used, length, epsilon))
            have += length - used
            after = seq
            if have >= limit_bytes:
                return out
        if len(rows) < PAGE_BLOCKS:
            return out


def free_bytes(session: Session, link_ids: Iterable[str]) -> dict[str, int]:
    """Unused bytes of each link (0 for a link without blocks), summed in the database.

    The scheduler's budget: one aggregate over the partial index instead of loading every
    unused block row.
    """
    ids = sorted(set(link_ids))
    out = dict.fromkeys(ids, 0)
    if not ids:
        return out
    rows = session.execute(
        select(LinkBlock.link_id, func.sum(LinkBlock.length - LinkBlock.used))
        .where(LinkBlock.link_id.in_(ids), LinkBlock.used < LinkBlock.length)
        .group_by(LinkBlock.link_id)
    ).all()
    for link_id, total in rows:
        out[str(link_id)] = int(total or 0)
    return out


def take(
    session: Session, keyring: Keyring, link_id: str, ranges: Sequence[Range]
) -> tuple[bytes, list[float]]:
    """Return the bytes of ``ranges`` (in order) and the epsilons of their blocks, and
    destroy them in the session's transaction.

    Raises:
        OutOfOrder: a block is missing or its consumption has not reached the range yet.
        LinkKeyReused: a range starts before its block's consumption point.
    """
    ids = {r.buffer_id for r in ranges}
    # Plain column rows and one executemany UPDATE: a segment touches hundreds of
    # blocks, and ORM objects (identity map, change tracking, per-row flush) cost more
    # than the cryptography. Nothing in the callers' sessions holds LinkBlock objects.
    rows = {
        row.block_id: row
        for row in session.execute(
            select(
                LinkBlock.seq,
                LinkBlock.block_id,
                LinkBlock.used,
                LinkBlock.length,
                LinkBlock.epsilon,
                LinkBlock.sealed,
            )
            .where(LinkBlock.link_id == link_id, LinkBlock.block_id.in_(ids))
            .with_for_update()
        )
    }
    parts: list[bytes] = []
    epsilons: list[float] = []
    fronts: dict[str, Front] = {}
    for r in ranges:
        row = rows.get(r.buffer_id)
        if row is None:
            raise OutOfOrder(f"not yet: block {r.buffer_id} of link {link_id} has not arrived")
        if r.buffer_id not in fronts:
            if row.sealed is None:
                raise LinkKeyReused()
            fronts[r.buffer_id] = block_front(
                keyring,
                link_id,
                row.block_id,
                sealed=row.sealed,
                used=row.used,
                length=row.length,
                refusals=_REFUSALS,
            )
            epsilons.append(row.epsilon)
        parts.append(fronts[r.buffer_id].take(r))
    changes = [
        {"b_seq": rows[block_id].seq, "b_used": front.used, "b_sealed": front.sealed_rest()}
        for block_id, front in fronts.items()
    ]
    session.connection().execute(_UPDATE_TAKEN, changes)
    return b"".join(parts), epsilons
