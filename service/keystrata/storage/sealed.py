"""Where sealed key material lives, and the associated data that binds it to its row.

Every sealed column is listed here once; sealing, opening and key-encryption-key
rotation all build the row's context with these functions, so a value copied to another
row (or another offset of the same block) fails to open.

Pair key is bound to its authorisation fields as well (layout 2): a segment to its pair,
side, partner, owner and length, a waiting key to its pair, owner, master, slaves and
size. Someone who can write the database but does not hold the KEK cannot re-point a
segment to another owner or a waiting key to another slave: the value does not open.
The consumption offset (``used``) is part of a segment's context, so an older sealed
value only opens together with its older offset; a row rolled back that way is behind
its partner's, which restore detection reports (``restore/comparison.py``). Layout 1
bound the row identity only; :mod:`keystrata.node.reseal`
moves rows to layout 2.
"""

from __future__ import annotations

from typing import Protocol


def _context(*parts: str | int) -> bytes:
    # Unit separator between parts: none of them may contain it (IDs are [A-Za-z0-9._-]).
    return "\x1f".join(str(p) for p in parts).encode()


def meta_context(name: str) -> bytes:
    """Context of a sealed ``node_meta`` value."""
    return _context("node_meta", name)


def block_context(link_id: str, block_id: str, used: int) -> bytes:
    """Context of a link block's remaining bytes, which start at offset ``used``."""
    return _context("link_block", link_id, block_id, used)


#: node_meta rows that hold sealed values (the others are plain).
SEALED_META = ("kek_check", "fingerprint_key", "ledger_signing_key")


#: The layout of the contexts below; stored in ``node_meta`` as ``seal_layout``.
LAYOUT = 2
LAYOUT_META = "seal_layout"


class SegmentRow(Protocol):
    segment_id: str
    pair_id: str
    side: str
    partner: str
    owner: str
    length: int


class KeyRow(Protocol):
    key_id: str
    pair_id: str
    owner: str
    master_sae: str
    slaves: str
    size_bits: int


def segment_context(row: SegmentRow, used: int) -> bytes:
    """Context of a pair key segment's remaining bytes, which start at offset ``used``."""
    return _context(
        "pair_segment",
        LAYOUT,
        row.segment_id,
        row.pair_id,
        row.side,
        row.partner,
        row.owner,
        row.length,
        used,
    )


def key_context(row: KeyRow) -> bytes:
    """Context of a key waiting at the slave's station for its slaves (``slaves`` as
    stored: the JSON list, which is never rewritten)."""
    return _context(
        "key_alloc",
        LAYOUT,
        row.key_id,
        row.pair_id,
        row.owner,
        row.master_sae,
        row.slaves,
        row.size_bits,
    )


def legacy_segment_context(segment_id: str, used: int) -> bytes:
    """Layout 1 of :func:`segment_context` (row identity only), for the move to layout 2."""
    return _context("pair_segment", segment_id, used)


def legacy_key_context(key_id: str) -> bytes:
    """Layout 1 of :func:`key_context`, for the move to layout 2."""
    return _context("key_alloc", key_id)
