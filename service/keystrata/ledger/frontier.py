"""The right edge of the ledger's Merkle tree, kept beside its size so that an append
needs no reads: the perfect subtrees that decompose ``[0, size)`` (one per set bit of
``size``, largest first; see :mod:`keystrata.ledger.merkle`, step 3). They are the only
left siblings a new leaf can need, and they give the tree head directly."""

from __future__ import annotations

from collections.abc import Iterable

from keystrata.ledger.merkle import HASH_SIZE


def positions(size: int) -> list[tuple[int, int]]:
    """(level, index) of the perfect subtrees that decompose ``[0, size)``."""
    out = []
    start = 0
    for level in range(size.bit_length() - 1, -1, -1):
        if size >> level & 1:
            out.append((level, start >> level))
            start += 1 << level
    return out


class Frontier:
    """A read-only :class:`~keystrata.ledger.merkle.SubtreeStore` over the right edge."""

    def __init__(self, size: int, stored: bytes | None) -> None:
        """``stored``: the subtree hashes of ``positions(size)``, concatenated in order."""
        places = positions(size)
        stored = stored or b""
        if len(stored) != HASH_SIZE * len(places):
            raise ValueError("the stored frontier does not match the ledger size")
        self.size = size
        self.hashes = {p: stored[i * HASH_SIZE : (i + 1) * HASH_SIZE] for i, p in enumerate(places)}

    def get(self, level: int, index: int) -> bytes:
        return self.hashes[(level, index)]

    def advance(self, new_rows: Iterable[tuple[int, int, bytes]], new_size: int) -> bytes:
        """The stored frontier (concatenated hashes) after appending ``new_rows`` to
        reach ``new_size`` leaves."""
        known = dict(self.hashes)
        known.update({(level, index): h for level, index, h in new_rows})
        return b"".join(known[p] for p in positions(new_size))
