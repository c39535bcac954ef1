"""Merkle tree hashing of RFC 9162 (Certificate Transparency 2.0), section 2.1.

Written for the client from the RFC, sharing no code with the server, so that an auditor's
verifier does not trust the implementation it checks:

* 2.1.1: a leaf hash is SHA-256(0x00 || entry), an interior node SHA-256(0x01 || left ||
  right), and the tree head MTH(D[n]) of n entries is SHA-256() for n = 0, the leaf hash
  for n = 1, else MTH(D[0:k]) and MTH(D[k:n]) joined, with k the largest power of two
  smaller than n.
* 2.1.3.1 PATH(m, D[n]): the audit path of entry m; 2.1.3.2: checking one.
* 2.1.4.1 PROOF(m, D[n]) = SUBPROOF(m, D[n], true): the consistency proof between the
  trees of m and n entries; 2.1.4.2: checking one.

:class:`LeafTable` keeps every perfect subtree (2^h leaves starting at a multiple of 2^h)
as it completes, in one byte array per level: 64 bytes per entry in all. Any MTH(D[a:b])
that is a node of a tree of the ledger (every root, path element and proof element) then
takes O(log n) hashes, so a verifier can check hundreds of checkpoints against a ledger
of millions of entries in one pass.
"""

from __future__ import annotations

import hashlib
import hmac
from collections.abc import Sequence

HASH_SIZE = 32
#: MTH({}) = SHA-256 of the empty string (RFC 9162 section 2.1.1).
EMPTY_ROOT = hashlib.sha256(b"").digest()


class ProofError(Exception):
    """A proof does not verify, or its sizes make no sense."""


def leaf_hash(entry: bytes) -> bytes:
    """Return SHA-256(0x00 || entry), the hash of one leaf (RFC 9162 section 2.1.1)."""
    return hashlib.sha256(b"\x00" + entry).digest()


def node_hash(left: bytes, right: bytes) -> bytes:
    """Return SHA-256(0x01 || left || right), an interior node (RFC 9162 section 2.1.1)."""
    return hashlib.sha256(b"\x01" + left + right).digest()


def _split(n: int) -> int:
    """The largest power of two smaller than ``n`` (n >= 2)."""
    return 1 << ((n - 1).bit_length() - 1)


def mth(entries: Sequence[bytes]) -> bytes:
    """Return MTH(D[n]) of ``entries`` straight from the recursive definition (2.1.1)."""
    n = len(entries)
    if n == 0:
        return EMPTY_ROOT
    if n == 1:
        return leaf_hash(entries[0])
    k = _split(n)
    return node_hash(mth(entries[:k]), mth(entries[k:]))


class LeafTable:
    """The leaf hashes of a growing ledger and every perfect subtree they complete."""

    def __init__(self) -> None:
        # _levels[h] holds, back to back, the hashes of subtrees [i * 2^h, (i + 1) * 2^h).
        self._levels: list[bytearray] = []
        self.size = 0

    def append(self, leaf: bytes) -> None:
        """Add the leaf hash of the next entry and the perfect subtrees it completes."""
        if len(leaf) != HASH_SIZE:
            raise ValueError("a leaf hash has 32 bytes")
        level, index, value = 0, self.size, leaf
        while True:
            if level == len(self._levels):
                self._levels.append(bytearray())
            self._levels[level] += value
            if index % 2 == 0:
                break
            left = bytes(self._levels[level][(index - 1) * HASH_SIZE : index * HASH_SIZE])
            value = node_hash(left, value)
            level, index = level + 1, index // 2
        self.size += 1

    def leaf(self, index: int) -> bytes:
        """Return the leaf hash of entry ``index``."""
        if not 0 <= index < self.size:
            raise IndexError(f"no entry {index} in a table of {self.size}")
        return bytes(self._levels[0][index * HASH_SIZE : (index + 1) * HASH_SIZE])

    def subtree(self, start: int, end: int) -> bytes:
        """Return MTH(D[start:end]) for 0 <= start <= end <= size."""
        if not 0 <= start <= end <= self.size:
            raise ValueError(f"range [{start}, {end}) is outside the table of {self.size}")
        n = end - start
        if n == 0:
            return EMPTY_ROOT
        if n & (n - 1) == 0 and start % n == 0:
            at = (start // n) * HASH_SIZE
            return bytes(self._levels[n.bit_length() - 1][at : at + HASH_SIZE])
        k = _split(n)
        return node_hash(self.subtree(start, start + k), self.subtree(start + k, end))

    def root(self, size: int | None = None) -> bytes:
        """Return MTH(D[0:size]) (default: all entries)."""
        return self.subtree(0, self.size if size is None else size)

    def inclusion_path(self, index: int, size: int) -> list[bytes]:
        """Return PATH(index, D[0:size]) of RFC 9162 section 2.1.3.1."""
        if not 0 <= index < size <= self.size:
            raise ValueError(f"no entry {index} in a tree of {size}")
        return self._path(index, 0, size)

    def _path(self, m: int, start: int, end: int) -> list[bytes]:
        n = end - start
        if n == 1:
            return []
        k = _split(n)
        if m < k:
            return [*self._path(m, start, start + k), self.subtree(start + k, end)]
        return [*self._path(m - k, start + k, end), self.subtree(start, start + k)]

    def consistency_proof(self, first: int, second: int) -> list[bytes]:
        """Return PROOF(first, D[0:second]) of RFC 9162 section 2.1.4.1 (0 < first <=
        second); empty when first == second."""
        if not 0 < first <= second <= self.size:
            raise ValueError(f"no consistency proof from {first} to {second}")
        return self._subproof(first, 0, second, True)

    def _subproof(self, m: int, start: int, end: int, whole: bool) -> list[bytes]:
        n = end - start
        if m == n:
            return [] if whole else [self.subtree(start, end)]
        k = _split(n)
        if m <= k:
            return [*self._subproof(m, start, start + k, whole), self.subtree(start + k, end)]
        return [*self._subproof(m - k, start + k, end, False), self.subtree(start, start + k)]


def _same(a: bytes, b: bytes) -> bool:
    return hmac.compare_digest(a, b)


def verify_inclusion(
    leaf: bytes, index: int, size: int, path: Sequence[bytes], root: bytes
) -> None:
    """Check an audit path by RFC 9162 section 2.1.3.2; return None when it holds.

    Raises:
        ProofError: the index is outside the tree, the path has the wrong length, or it
            does not lead from ``leaf`` to ``root``.
    """
    if not 0 <= index < size:
        raise ProofError(f"index {index} is not in a tree of {size}")
    fn, sn, r = index, size - 1, leaf
    for p in path:
        if sn == 0:
            raise ProofError("audit path is longer than the tree is deep")
        if fn & 1 or fn == sn:
            r = node_hash(p, r)
            while fn != 0 and not fn & 1:  # fn == sn: climb past the missing right siblings
                fn, sn = fn >> 1, sn >> 1
        else:
            r = node_hash(r, p)
        fn, sn = fn >> 1, sn >> 1
    if sn != 0:
        raise ProofError("audit path is shorter than the tree is deep")
    if not _same(r, root):
        raise ProofError(f"audit path of entry {index} does not lead to the root")


def verify_consistency(
    first: int, second: int, first_root: bytes, second_root: bytes, proof: Sequence[bytes]
) -> None:
    """Check a consistency proof by RFC 9162 section 2.1.4.2; return None when it holds.

    ``first == second`` needs an empty proof and equal roots (PROOF(n, D[n]) is empty).

    Raises:
        ProofError: the sizes are not 0 < first <= second, or the proof does not show the
            tree of ``first`` entries to be a prefix of the tree of ``second``.
    """
    if not 0 < first <= second:
        raise ProofError(f"no consistency proof from size {first} to size {second}")
    if first == second:
        if proof or not _same(first_root, second_root):
            raise ProofError("two trees of the same size must have the same root")
        return
    if not proof:
        raise ProofError("consistency proof is empty")
    path = list(proof)
    if first & (first - 1) == 0:  # an exact power of two: the old root is a node itself
        path.insert(0, first_root)
    fn, sn = first - 1, second - 1
    while fn & 1:
        fn, sn = fn >> 1, sn >> 1
    fr = sr = path[0]
    for c in path[1:]:
        if sn == 0:
            raise ProofError("consistency proof is longer than the tree is deep")
        if fn & 1 or fn == sn:
            fr, sr = node_hash(c, fr), node_hash(c, sr)
            while fn != 0 and not fn & 1:
                fn, sn = fn >> 1, sn >> 1
        else:
            sr = node_hash(sr, c)
        fn, sn = fn >> 1, sn >> 1
    if sn != 0:
        raise ProofError("consistency proof is shorter than the tree is deep")
    if not (_same(fr, first_root) and _same(sr, second_root)):
        raise ProofError(f"the tree of {first} entries is not a prefix of the tree of {second}")
