"""The ledger's Merkle tree: RFC 9162 (Certificate Transparency 2.0) section 2.1.

The ledger is an append-only list of entries (RFC 8785 canonical JSON bytes). Its tree
hash, audit paths and consistency proofs are exactly those of RFC 9162 section 2.1, so
any implementation of that RFC can check what this node publishes. The steps:

1. Hashing (section 2.1.1). SHA-256 with domain separation: a leaf is
   ``SHA-256(0x00 || entry)``, an interior node ``SHA-256(0x01 || left || right)``, and
   the empty tree ``SHA-256("")``. The Merkle Tree Hash of n > 1 entries splits them at
   k, the largest power of two smaller than n: ``MTH(D[n]) = node(MTH(D[0:k]),
   MTH(D[k:n]))``.

2. Storage (ours, not the RFC's). The ledger will hold millions of entries, so nothing
   here replays leaves. The tree is kept as the hashes of its *perfect subtrees*:
   ``H(h, i)`` is the MTH of the ``2**h`` leaves ``[i * 2**h, (i + 1) * 2**h)``. They
   never change once complete, so appending leaf number ``n`` writes ``H(0, n)`` and,
   for every level at which ``n`` closes a pair, the parent built from the stored left
   sibling: at most ``log2(n) + 1`` new rows, each computed from one read. How the rows
   are kept is the caller's business (:class:`SubtreeStore`); this module only reads.

3. Any node of the RFC's tree covers leaves ``[s, e)`` where ``s`` is a multiple of the
   smallest power of two not below ``e - s`` (the left child of every split is perfect,
   and the right part starts on the boundary of that perfect left part). So the range
   splits, by the bits of ``e - s`` from the highest down, into aligned perfect
   subtrees, and folding their stored hashes from the right gives the node's MTH: the
   first piece is the RFC's "largest power of two smaller than n" left part, the fold of
   the rest its right part. That costs at most ``log2(e - s) + 1`` reads.

4. Tree head (section 2.1.1): ``root(store, n)`` is step 3 over ``[0, n)``.

5. Audit path (section 2.1.3.1, ``PATH(m, D[n])``): walk down from the root, taking at
   each split the sibling of the side that holds leaf ``m``. Once the walk goes left it
   is inside a perfect subtree and every later sibling is one stored row; only the
   first left turn can need a non-perfect right sibling (step 3). The RFC lists the
   path from the leaf up, so the collected siblings are reversed.

6. Consistency proof (section 2.1.4.1, ``PROOF(m, D[n]) = SUBPROOF(m, D[n], true)``):
   the same walk, going left while ``m <= k`` and right otherwise; where the old tree
   ends exactly on a node, that node's hash is added unless it is the old root itself
   (the verifier already holds it). The same read bound as step 5 holds.

7. Verification (sections 2.1.3.2 and 2.1.4.2): the RFC's step-by-step algorithms with
   the ``fn``/``sn`` bit shifts, numbered as in the RFC below. They raise
   :class:`ProofError`; they never return a flag. Hashes are compared in constant time
   (they are not secret, but the habit costs nothing).
"""

from __future__ import annotations

import hashlib
import hmac
from collections.abc import Sequence
from typing import Protocol

HASH_SIZE = 32
_LEAF_PREFIX = b"\x00"
_NODE_PREFIX = b"\x01"

#: MTH({}) = SHA-256() (RFC 9162 section 2.1.1): the root of the empty tree.
EMPTY_ROOT = hashlib.sha256(b"").digest()


class ProofError(ValueError):
    """An inclusion or consistency proof does not prove what it claims."""


class SubtreeStore(Protocol):
    """Read access to stored perfect-subtree hashes.

    ``get(level, index)`` returns ``H(level, index)``, the MTH of leaves
    ``[index * 2**level, (index + 1) * 2**level)``, and raises ``KeyError`` when that
    subtree is not stored (not complete yet, or never written).
    """

    def get(self, level: int, index: int) -> bytes: ...


# ---------------------------------------------------------------- hashing (2.1.1)


def leaf_hash(entry: bytes) -> bytes:
    """Return the RFC 9162 leaf hash ``SHA-256(0x00 || entry)``."""
    return hashlib.sha256(_LEAF_PREFIX + entry).digest()


def node_hash(left: bytes, right: bytes) -> bytes:
    """Return the RFC 9162 interior node hash ``SHA-256(0x01 || left || right)``."""
    return hashlib.sha256(_NODE_PREFIX + left + right).digest()


def _split(n: int) -> int:
    """Return k, the largest power of two smaller than ``n`` (``n >= 2``)."""
    return 1 << ((n - 1).bit_length() - 1)


# ---------------------------------------------------------------- appending (step 2)


def append(
    store: SubtreeStore, size: int, leaf_hashes: Sequence[bytes]
) -> list[tuple[int, int, bytes]]:
    """Compute the perfect subtrees completed by appending ``leaf_hashes``.

    ``size`` is the number of leaves the store holds now; the new leaves get indices
    ``size``, ``size + 1``, ... Nothing is written: the caller stores the returned rows
    in the same transaction as the entries, so a crash leaves both or neither.

    Returns:
        ``(level, index, hash)`` rows in the order they were computed: for each leaf,
        the leaf itself at level 0, then each parent it completes.

    Raises:
        ValueError: ``size`` is negative or a leaf hash is not 32 bytes.
        KeyError: the store lacks a left sibling it should hold (it is not at ``size``).
    """
    if size < 0:
        raise ValueError(f"size must be >= 0, got {size}")
    rows: list[tuple[int, int, bytes]] = []
    # Rows computed earlier in this batch are not in the store yet.
    fresh: dict[tuple[int, int], bytes] = {}
    for position, digest in enumerate(leaf_hashes, start=size):
        if len(digest) != HASH_SIZE:
            raise ValueError(f"a leaf hash has {HASH_SIZE} bytes, got {len(digest)}")
        level, index = 0, position
        rows.append((level, index, digest))
        fresh[(level, index)] = digest
        # An odd index is a right child: its left sibling is complete, so is the parent.
        while index & 1:
            left = fresh.get((level, index - 1))
            if left is None:
                left = store.get(level, index - 1)
            digest = node_hash(left, digest)
            level, index = level + 1, index >> 1
            rows.append((level, index, digest))
            fresh[(level, index)] = digest
    return rows


# ---------------------------------------------------------------- tree hashes (steps 3, 4)


def _range_hash(store: SubtreeStore, start: int, end: int) -> bytes:
    """Return MTH(D[start:end]) for a node ``[start, end)`` of the RFC's tree (step 3)."""
    pieces: list[bytes] = []
    position, remaining = start, end - start
    while remaining:
        level = remaining.bit_length() - 1
        pieces.append(store.get(level, position >> level))
        position += 1 << level
        remaining -= 1 << level
    digest = pieces.pop()
    while pieces:
        digest = node_hash(pieces.pop(), digest)
    return digest


def root(store: SubtreeStore, size: int) -> bytes:
    """Return the RFC 9162 tree head MTH of the first ``size`` leaves.

    Reads one stored row per set bit of ``size``.

    Raises:
        ValueError: ``size`` is negative.
        KeyError: the store lacks a subtree of that tree (it holds fewer leaves).
    """
    if size < 0:
        raise ValueError(f"size must be >= 0, got {size}")
    if size == 0:
        return EMPTY_ROOT
    return _range_hash(store, 0, size)


# ---------------------------------------------------------------- proofs (steps 5, 6)


def inclusion_proof(store: SubtreeStore, index: int, size: int) -> list[bytes]:
    """Return the RFC 9162 audit path ``PATH(index, D[size])``, leaf side first.

    Raises:
        ValueError: not ``0 <= index < size``.
        KeyError: the store holds fewer than ``size`` leaves.
    """
    if not 0 <= index < size:
        raise ValueError(f"need 0 <= index < size, got index={index}, size={size}")
    siblings: list[bytes] = []
    start, end = 0, size
    # PATH(m, D[n]) = PATH(m, D[0:k]) : MTH(D[k:n])      for m < k
    # PATH(m, D[n]) = PATH(m - k, D[k:n]) : MTH(D[0:k])  for m >= k
    while end - start > 1:
        middle = start + _split(end - start)
        if index < middle:
            siblings.append(_range_hash(store, middle, end))
            end = middle
        else:
            siblings.append(_range_hash(store, start, middle))
            start = middle
    siblings.reverse()
    return siblings


def consistency_proof(store: SubtreeStore, old_size: int, new_size: int) -> list[bytes]:
    """Return the RFC 9162 consistency proof ``PROOF(old_size, D[new_size])``.

    The proof is empty when the sizes are equal.

    Raises:
        ValueError: not ``0 < old_size <= new_size``.
        KeyError: the store holds fewer than ``new_size`` leaves.
    """
    if not 0 < old_size <= new_size:
        raise ValueError(
            f"need 0 < old_size <= new_size, got old_size={old_size}, new_size={new_size}"
        )
    nodes: list[bytes] = []
    start, end, m = 0, new_size, old_size
    at_old_root = True  # SUBPROOF's flag b: the node is still the whole old tree
    # SUBPROOF(m, D[m], true) = {};  SUBPROOF(m, D[m], false) = {MTH(D[m])}
    # m <= k: SUBPROOF(m, D[0:k], b) : MTH(D[k:n])
    # m > k:  SUBPROOF(m - k, D[k:n], false) : MTH(D[0:k])
    while m != end - start:
        middle = start + _split(end - start)
        if m <= middle - start:
            nodes.append(_range_hash(store, middle, end))
            end = middle
        else:
            nodes.append(_range_hash(store, start, middle))
            m -= middle - start
            start = middle
            at_old_root = False
    if not at_old_root:
        nodes.append(_range_hash(store, start, end))
    nodes.reverse()
    return nodes


# ---------------------------------------------------------------- verification (step 7)


def _check_hash(name: str, value: bytes) -> None:
    if len(value) != HASH_SIZE:
        raise ProofError(f"{name} must be {HASH_SIZE} bytes, got {len(value)}")


def verify_inclusion(
    leaf_hash: bytes, index: int, size: int, proof: Sequence[bytes], root: bytes
) -> None:
    """Check that ``proof`` places ``leaf_hash`` at ``index`` in the tree ``root``.

    RFC 9162 section 2.1.3.2, step by step.

    Raises:
        ProofError: the proof does not verify, or an argument is malformed.
    """
    _check_hash("leaf hash", leaf_hash)
    _check_hash("root", root)
    for element in proof:
        _check_hash("a proof element", element)
    # 1. Compare leaf_index against tree_size. If leaf_index >= tree_size, fail.
    if not 0 <= index < size:
        raise ProofError(f"need 0 <= index < size, got index={index}, size={size}")
    # 2. Set fn to leaf_index and sn to tree_size - 1.
    fn, sn = index, size - 1
    # 3. Set r to hash.
    r = leaf_hash
    # 4. For each value p in the inclusion_path array:
    for p in proof:
        # a. If sn is 0, then stop the iteration and fail the proof verification.
        if sn == 0:
            raise ProofError("inclusion proof is longer than the path to the root")
        # b. If LSB(fn) is set, or if fn is equal to sn, then:
        if fn & 1 or fn == sn:
            # i. Set r to HASH(0x01 || p || r).
            r = node_hash(p, r)
            # ii. If LSB(fn) is not set, then right-shift both fn and sn equally until
            #     either LSB(fn) is set or fn is 0.
            while not fn & 1 and fn != 0:
                fn >>= 1
                sn >>= 1
        # Otherwise: i. Set r to HASH(0x01 || r || p).
        else:
            r = node_hash(r, p)
        # c. Finally, right-shift both fn and sn one time.
        fn >>= 1
        sn >>= 1
    # 5. Compare sn to 0. Compare r against the root_hash. If sn is equal to 0 and r
    #    and the root_hash are equal, the inclusion is proven; otherwise fail.
    if sn != 0:
        raise ProofError("inclusion proof is shorter than the path to the root")
    if not hmac.compare_digest(r, root):
        raise ProofError("inclusion proof does not lead to the root")


def verify_consistency(
    old_size: int, new_size: int, old_root: bytes, new_root: bytes, proof: Sequence[bytes]
) -> None:
    """Check that the tree ``new_root`` of ``new_size`` extends ``old_root`` of ``old_size``.

    RFC 9162 section 2.1.4.2, step by step. Equal sizes are the RFC's definition
    ``PROOF(m, D[m]) = SUBPROOF(m, D[m], true) = {}`` (section 2.1.4.1): an empty proof,
    and the two roots must be the same.

    Raises:
        ProofError: the proof does not verify, or an argument is malformed.
    """
    _check_hash("old root", old_root)
    _check_hash("new root", new_root)
    for element in proof:
        _check_hash("a proof element", element)
    if not 0 < old_size <= new_size:
        raise ProofError(
            f"need 0 < old_size <= new_size, got old_size={old_size}, new_size={new_size}"
        )
    if old_size == new_size:
        if proof:
            raise ProofError("the consistency proof between equal sizes is empty")
        if not hmac.compare_digest(old_root, new_root):
            raise ProofError("roots of the same size differ")
        return
    # 1. If consistency_path is an empty array, stop and fail the proof verification.
    if not proof:
        raise ProofError("consistency proof is empty")
    path = list(proof)
    # 2. If first is an exact power of 2, then prepend first_hash to the array.
    if old_size & (old_size - 1) == 0:
        path.insert(0, old_root)
    # 3. Set fn to first - 1 and sn to second - 1.
    fn, sn = old_size - 1, new_size - 1
    # 4. If LSB(fn) is set, then right-shift both fn and sn equally until LSB(fn) is
    #    not set.
    while fn & 1:
        fn >>= 1
        sn >>= 1
    # 5. Set both fr and sr to the first value in the consistency_path array.
    fr = sr = path[0]
    # 6. For each subsequent value c in the consistency_path array:
    for c in path[1:]:
        # a. If sn is 0, then stop the iteration and fail the proof verification.
        if sn == 0:
            raise ProofError("consistency proof is longer than the path to the root")
        # b. If LSB(fn) is set, or if fn is equal to sn, then:
        if fn & 1 or fn == sn:
            # i. Set fr to HASH(0x01 || c || fr).  ii. Set sr to HASH(0x01 || c || sr).
            fr = node_hash(c, fr)
            sr = node_hash(c, sr)
            # iii. If LSB(fn) is not set, then right-shift both fn and sn equally until
            #      either LSB(fn) is set or fn is 0.
            while not fn & 1 and fn != 0:
                fn >>= 1
                sn >>= 1
        # Otherwise: i. Set sr to HASH(0x01 || sr || c).
        else:
            sr = node_hash(sr, c)
        # c. Finally, right-shift both fn and sn one time.
        fn >>= 1
        sn >>= 1
    # 7. Verify that fr equals first_hash, sr equals second_hash, and sn is 0.
    if sn != 0:
        raise ProofError("consistency proof is shorter than the path to the root")
    if not hmac.compare_digest(fr, old_root):
        raise ProofError("consistency proof does not lead to the old root")
    if not hmac.compare_digest(sr, new_root):
        raise ProofError("consistency proof does not lead to the new root")
