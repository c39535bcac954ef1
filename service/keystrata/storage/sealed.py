"""Where sealed key material lives, and the associated data that binds it to its row.

Every sealed column is listed here once; sealing, opening and key-encryption-key
rotation all build the row's context with these functions, so a value copied to another
row (or another offset of the same block) fails to open.
"""

from __future__ import annotations


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


def segment_context(segment_id: str, used: int) -> bytes:
    """Context of a pair key segment's remaining bytes, which start at offset ``used``."""
    return _context("pair_segment", segment_id, used)


def key_context(key_id: str) -> bytes:
    """Context of a key waiting at the slave's station for its slaves."""
    return _context("key_alloc", key_id)
