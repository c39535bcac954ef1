"""Reading and destroying link key bytes, shared by the relay and the stations.

Both ends of a QKD link consume each block from its front: the relay decides which
bytes a relay operation uses, and the station applies the same ranges later. A range
must start exactly where its block's consumption stands (``offset == used``):

* ``offset > used``: an earlier operation on this block has not been applied here yet
  (its message is still on its way), so the caller retries later;
* ``offset < used``: those bytes were used already; applying the range would reuse
  link key, so it is refused.

Taking bytes destroys them in the caller's transaction: the block's remaining bytes are
re-sealed from the new offset (or the sealed value is dropped when nothing is left).
"""

from __future__ import annotations

from collections.abc import Sequence

from sqlalchemy import select
from sqlalchemy.orm import Session

from keystrata.crypto.hazmat import Keyring
from keystrata.domain.relay import Available, Range
from keystrata.errors import KeystrataError
from keystrata.storage.models import LinkBlock
from keystrata.storage.sealed import block_context


class NotYet(KeystrataError):
    """The link bytes a message names have not all arrived or been reached here yet."""

    status = 409
    default_message = "not yet: the link key this message names is not available here yet"


class LinkKeyReused(KeystrataError):
    """A range names link bytes this node has already used."""

    status = 409
    default_message = "refused: the message names link key that was already used"


def available(session: Session, link_id: str, limit_bytes: int) -> list[Available]:
    """Blocks of ``link_id`` with unused bytes, oldest first, until ``limit_bytes``."""
    out: list[Available] = []
    have = 0
    rows = session.execute(
        select(LinkBlock.block_id, LinkBlock.used, LinkBlock.length, LinkBlock.epsilon)
        .where(LinkBlock.link_id == link_id, LinkBlock.used < LinkBlock.length)
        .order_by(LinkBlock.seq)
    )
    for block_id, used, length, epsilon in rows:
        out.append(Available(block_id, used, length, epsilon))
        have += length - used
        if have >= limit_bytes:
            break
    return out


def take(
    session: Session, keyring: Keyring, link_id: str, ranges: Sequence[Range]
) -> tuple[bytes, list[float]]:
    """Return the bytes of ``ranges`` (in order) and the epsilons of their blocks, and
    destroy them in the session's transaction.

    Raises:
        NotYet: a block is missing or its consumption has not reached the range yet.
        LinkKeyReused: a range starts before its block's consumption point.
    """
    ids = {r.block_id for r in ranges}
    rows = {
        row.block_id: row
        for row in session.execute(
            select(LinkBlock)
            .where(LinkBlock.link_id == link_id, LinkBlock.block_id.in_(ids))
            .with_for_update()
        ).scalars()
    }
    parts: list[bytes] = []
    epsilons: list[float] = []
    opened: dict[str, tuple[int, bytes]] = {}
    for r in ranges:
        row = rows.get(r.block_id)
        if row is None:
            raise NotYet(f"not yet: block {r.block_id} of link {link_id} has not arrived")
        if r.block_id not in opened:
            if row.sealed is None:
                raise LinkKeyReused()
            remainder = keyring.open(row.sealed, block_context(link_id, row.block_id, row.used))
            opened[r.block_id] = (row.used, remainder)
            epsilons.append(row.epsilon)
        start, remainder = opened[r.block_id]
        if r.offset < start:
            raise LinkKeyReused()
        if r.offset > start:
            raise NotYet(f"not yet: block {r.block_id} is consumed up to byte {start} here")
        if r.length <= 0 or r.offset + r.length > row.length:
            raise LinkKeyReused("refused: a range lies outside its block")
        parts.append(remainder[: r.length])
        opened[r.block_id] = (start + r.length, remainder[r.length :])
    for block_id, (new_used, remainder) in opened.items():
        row = rows[block_id]
        row.used = new_used
        row.sealed = (
            keyring.seal(remainder, block_context(link_id, block_id, new_used))
            if remainder
            else None
        )
    return b"".join(parts), epsilons
