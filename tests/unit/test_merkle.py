"""The ledger's Merkle tree (``keystrata.ledger.merkle``) against RFC 9162 section 2.1.

Outside references, each named beside its check:

* RFC 9162 section 2.1.1 (MTH), 2.1.3.1 (PATH), 2.1.4.1 (PROOF / SUBPROOF): the test
  carries its own naive recursive versions of these definitions, written straight from
  the RFC over the raw entries (no stored subtrees, no code shared with the module),
  and compares the module's roots and proofs with them element by element.
* RFC 9162 section 2.1.5: the 7-leaf example tree, its audit paths and consistency
  proofs by node name, recalled from memory and also derived from the definitions.
* pymerkle 7 (PyPI), an independent general-purpose implementation: its default tree
  uses the RFC 9162 prefixes and its inclusion paths are the RFC's audit paths with the
  leaf hash in front and 1-based indices. Its consistency proofs are in a format of its
  own, so they are not compared element-wise; pymerkle only checks, with its own
  verifier, that our roots of two sizes are consistent.
* FIPS 180-4 SHA-256 of the empty string (the RFC's MTH({})), value from memory.
"""

from __future__ import annotations

import hashlib
import math
import time
from collections.abc import Sequence
from functools import cache
from random import Random

import pymerkle  # type: ignore[import-untyped]
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from keystrata.ledger.merkle import (
    EMPTY_ROOT,
    ProofError,
    SubtreeStore,
    append,
    consistency_proof,
    inclusion_proof,
    leaf_hash,
    node_hash,
    root,
    verify_consistency,
    verify_inclusion,
)

Range = tuple[int, int]


class MemoryStore:
    """A dict-backed :class:`SubtreeStore`."""

    def __init__(self) -> None:
        self.hashes: dict[tuple[int, int], bytes] = {}

    def get(self, level: int, index: int) -> bytes:
        """Return ``H(level, index)``; raise ``KeyError`` when it is not stored."""
        return self.hashes[(level, index)]

    def put(self, rows: Sequence[tuple[int, int, bytes]]) -> None:
        """Store the ``(level, index, hash)`` rows that :func:`append` returned."""
        for level, index, digest in rows:
            self.hashes[(level, index)] = digest


# ------------------------------------------------- RFC 9162 definitions, naively


def _k(n: int) -> int:
    """The largest power of two smaller than n (RFC 9162 section 2.1.1), by counting."""
    k = 1
    while k * 2 < n:
        k *= 2
    return k


def naive_mth(entries: Sequence[bytes]) -> bytes:
    """MTH(D[n]) exactly as RFC 9162 section 2.1.1 defines it, recursively."""
    n = len(entries)
    if n == 0:
        return hashlib.sha256(b"").digest()
    if n == 1:
        return hashlib.sha256(b"\x00" + entries[0]).digest()
    k = _k(n)
    return hashlib.sha256(b"\x01" + naive_mth(entries[:k]) + naive_mth(entries[k:])).digest()


def naive_path(m: int, start: int, end: int) -> list[Range]:
    """PATH(m, D[start:end]) of RFC 9162 section 2.1.3.1, as the ranges of its nodes."""
    if end - start == 1:
        return []
    k = _k(end - start)
    if m < k:
        return [*naive_path(m, start, start + k), (start + k, end)]
    return [*naive_path(m - k, start + k, end), (start, start + k)]


def naive_subproof(m: int, start: int, end: int, b: bool) -> list[Range]:
    """SUBPROOF(m, D[start:end], b) of RFC 9162 section 2.1.4.1, as node ranges."""
    n = end - start
    if m == n:
        return [] if b else [(start, end)]
    k = _k(n)
    if m <= k:
        return [*naive_subproof(m, start, start + k, b), (start + k, end)]
    return [*naive_subproof(m - k, start + k, end, False), (start, start + k)]


def naive_proof(m: int, n: int) -> list[Range]:
    """PROOF(m, D[n]) = SUBPROOF(m, D[n], true) (RFC 9162 section 2.1.4.1)."""
    return naive_subproof(m, 0, n, True)


def hashes_of(entries: Sequence[bytes], ranges: Sequence[Range]) -> list[bytes]:
    return [naive_mth(entries[s:e]) for s, e in ranges]


# ------------------------------------------------- helpers


def make_entries(n: int, tag: str = "e") -> list[bytes]:
    # Distinct entries, so that no two subtrees share a hash by accident.
    return [b'{"i":%d,"t":"%s"}' % (i, tag.encode()) for i in range(n)]


def build(entries: Sequence[bytes]) -> MemoryStore:
    store = MemoryStore()
    store.put(append(store, 0, [leaf_hash(e) for e in entries]))
    return store


@cache
def big() -> tuple[list[bytes], MemoryStore]:
    """One tree of 4096 leaves: a proof at size n reads only subtrees inside [0, n)."""
    entries = make_entries(4096, "big")
    return entries, build(entries)


@cache
def pymerkle_tree(n: int) -> pymerkle.InmemoryTree:
    return pymerkle.InmemoryTree.init_from_entries(make_entries(n, "big"))


def flip(value: bytes, bit: int) -> bytes:
    out = bytearray(value)
    out[(bit // 8) % len(out)] ^= 1 << (bit % 8)
    return bytes(out)


class CountingStore:
    """Wraps a store and counts its reads."""

    def __init__(self, inner: SubtreeStore) -> None:
        self.inner = inner
        self.reads = 0

    def get(self, level: int, index: int) -> bytes:
        self.reads += 1
        return self.inner.get(level, index)


class LazyStore:
    """Pretends to hold every perfect subtree of a tree of ``size`` leaves.

    Each hash is a deterministic fake (SHA-256 of the coordinates), so a million-leaf
    tree costs nothing to set up; a subtree that is not complete at ``size`` is absent,
    as in a real store.
    """

    def __init__(self, size: int) -> None:
        self.size = size

    def get(self, level: int, index: int) -> bytes:
        if level < 0 or index < 0 or (index + 1) << level > self.size:
            raise KeyError((level, index))
        return hashlib.sha256(b"fake:%d:%d" % (level, index)).digest()


# ------------------------------------------------- hashing (RFC 9162 section 2.1.1)


def test_hash_prefixes_follow_rfc_9162() -> None:
    # RFC 9162 section 2.1.1: leaf = SHA-256(0x00 || d), node = SHA-256(0x01 || l || r).
    assert leaf_hash(b"abc") == hashlib.sha256(b"\x00abc").digest()
    assert (
        node_hash(b"L" * 32, b"R" * 32) == hashlib.sha256(b"\x01" + b"L" * 32 + b"R" * 32).digest()
    )
    # pymerkle's default hasher, independently.
    hasher = pymerkle.InmemoryTree()
    assert leaf_hash(b"abc") == hasher.hash_buff(b"abc")
    assert node_hash(b"L" * 32, b"R" * 32) == hasher.hash_pair(b"L" * 32, b"R" * 32)


def test_empty_root() -> None:
    # MTH({}) = SHA-256() (RFC 9162 section 2.1.1); the digest of the empty string is
    # e3b0c442...b855 (FIPS 180-4 SHA-256, value from memory).
    expected = "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"
    assert EMPTY_ROOT.hex() == expected
    assert root(MemoryStore(), 0) == EMPTY_ROOT
    assert pymerkle.InmemoryTree().get_root() == EMPTY_ROOT


# ------------------------------------------------- storage of perfect subtrees


def test_append_stores_exactly_the_completed_perfect_subtrees() -> None:
    entries = make_entries(70)
    store = MemoryStore()
    for n, entry in enumerate(entries):
        rows = append(store, n, [leaf_hash(entry)])
        # Leaf n itself, then one parent per trailing 1 bit of n: at most log2(n) + 1.
        trailing_ones = (n ^ (n + 1)).bit_length() - 1
        assert len(rows) == 1 + trailing_ones
        assert len(rows) <= math.log2(n + 1) + 1
        for level, index, digest in rows:
            assert (index + 1) << level == n + 1  # each new subtree ends at the new leaf
            # The RFC's MTH of those 2**level leaves, computed naively.
            assert digest == naive_mth(entries[index << level : (index + 1) << level])
        store.put(rows)
    expected = {(h, i) for h in range(8) for i in range(70) if (i + 1) << h <= 70}
    assert set(store.hashes) == expected


def test_append_reads_one_left_sibling_per_completed_parent() -> None:
    # Appending leaf 2**20 - 1 completes 20 parents (levels 1 to 20), each from one read.
    counting = CountingStore(LazyStore(2**20 - 1))
    rows = append(counting, 2**20 - 1, [leaf_hash(b"x")])
    assert [(level, index) for level, index, _ in rows] == [
        (h, (2**20 - 1) >> h) for h in range(21)
    ]
    assert counting.reads == 20


def test_append_rejects_bad_arguments() -> None:
    store = MemoryStore()
    with pytest.raises(ValueError, match="size"):
        append(store, -1, [leaf_hash(b"x")])
    with pytest.raises(ValueError, match="32 bytes"):
        append(store, 0, [b"short"])
    # A store that is not at the size the caller claims lacks a left sibling.
    with pytest.raises(KeyError):
        append(store, 1, [leaf_hash(b"x")])


# ------------------------------------------------- roots and audit paths vs pymerkle


def _sizes_for_pymerkle() -> list[int]:
    rng = Random(9162)
    return [*range(1, 71), *sorted(rng.sample(range(71, 4097), 12)), 4096]


@pytest.mark.parametrize("n", _sizes_for_pymerkle())
def test_roots_and_audit_paths_match_pymerkle(n: int) -> None:
    entries, store = big()
    tree = pymerkle_tree(n)
    our_root = root(store, n)
    assert our_root == tree.get_root()
    indices = (
        range(n)
        if n <= 70
        else sorted({0, 1, n // 2, n - 2, n - 1, *Random(n).sample(range(n), 40)})
    )
    for index in indices:
        ours = inclusion_proof(store, index, n)
        theirs = tree.prove_inclusion(index + 1)  # pymerkle counts leaves from 1
        assert theirs.path[0] == leaf_hash(entries[index])  # its path starts with the leaf
        assert ours == theirs.path[1:]
        verify_inclusion(leaf_hash(entries[index]), index, n, ours, our_root)
        pymerkle.verify_inclusion(leaf_hash(entries[index]), our_root, theirs)


def test_roots_at_every_smaller_size_match_pymerkle() -> None:
    # pymerkle's root of the first m leaves of a larger tree, against ours from the
    # shared 4096-leaf store: proofs and roots at size m never read past leaf m.
    _, store = big()
    tree = pymerkle_tree(300)
    for m in range(301):
        assert root(store, m) == tree.get_root(m)


# ------------------------------------------------- proofs vs the RFC definitions


@pytest.mark.parametrize("n", range(1, 41))
def test_proofs_match_rfc_definitions(n: int) -> None:
    entries, store = big()
    prefix = entries[:n]
    new_root = root(store, n)
    # Brute force: MTH straight from RFC 9162 section 2.1.1 over the raw entries.
    assert new_root == naive_mth(prefix)
    for index in range(n):
        # PATH(m, D[n]), RFC 9162 section 2.1.3.1.
        assert inclusion_proof(store, index, n) == hashes_of(prefix, naive_path(index, 0, n))
    tree = pymerkle_tree(n)
    for m in range(1, n + 1):
        old_root = root(store, m)
        assert old_root == naive_mth(prefix[:m])
        proof = consistency_proof(store, m, n)
        # PROOF(m, D[n]), RFC 9162 section 2.1.4.1.
        assert proof == hashes_of(prefix, naive_proof(m, n))
        # The RFC 9162 section 2.1.4.2 verifier accepts it.
        verify_consistency(m, n, old_root, new_root, proof)
        # pymerkle's own consistency proof and verifier accept our two roots.
        pymerkle.verify_consistency(old_root, new_root, tree.prove_consistency(m, n))


# ------------------------------------------------- RFC 9162 section 2.1.5 example

# The example tree of RFC 9162 section 2.1.5 (from memory), seven leaves d0 to d6:
#
#              hash
#             /    \
#            k      l
#           / \    / \
#          g   h  i   j
#         / \ / \/ \  |
#         a b c d e f d6
#
# a..f are the leaves d0..d5 and j is the leaf d6; g = [0, 2), h = [2, 4), i = [4, 6),
# k = [0, 4), l = [4, 7).
NAMES: dict[Range, str] = {
    (0, 1): "a", (1, 2): "b", (2, 3): "c", (3, 4): "d", (4, 5): "e", (5, 6): "f",
    (6, 7): "j", (0, 2): "g", (2, 4): "h", (4, 6): "i", (0, 4): "k", (4, 7): "l",
}  # fmt: skip

# From memory of RFC 9162 section 2.1.5: "the audit path for d0 is [b, h, l]", for d3
# [c, g, l], for d4 [f, j, k], for d6 [i, k].
AUDIT_PATHS = {0: "bhl", 3: "cgl", 4: "fjk", 6: "ik"}
# From memory of the same section: PROOF(3, D[7]) = [c, d, g, l], PROOF(4, D[7]) = [l],
# PROOF(6, D[7]) = [i, j, k].
CONSISTENCY = {3: "cdgl", 4: "l", 6: "ijk"}


def test_rfc_9162_example_tree() -> None:
    entries = [b"d%d" % i for i in range(7)]
    store = build(entries)
    by_hash = {naive_mth(entries[s:e]): name for (s, e), name in NAMES.items()}
    assert len(by_hash) == len(NAMES)  # the names identify the nodes unambiguously
    assert root(store, 7) == naive_mth(entries)

    for index, names in AUDIT_PATHS.items():
        # The recalled example agrees with the RFC's recursive definition ...
        assert "".join(NAMES[r] for r in naive_path(index, 0, 7)) == names
        # ... and the module produces those nodes.
        assert "".join(by_hash[h] for h in inclusion_proof(store, index, 7)) == names
    for m, names in CONSISTENCY.items():
        assert "".join(NAMES[r] for r in naive_proof(m, 7)) == names
        assert "".join(by_hash[h] for h in consistency_proof(store, m, 7)) == names
        verify_consistency(m, 7, root(store, m), root(store, 7), consistency_proof(store, m, 7))


# ------------------------------------------------- tampering


def rejects_inclusion(
    leaf: bytes,
    index: int,
    size: int,
    proof: Sequence[bytes],
    tree_root: bytes,
    match: str | None = None,
) -> None:
    with pytest.raises(ProofError, match=match):
        verify_inclusion(leaf, index, size, proof, tree_root)


def rejects_consistency(
    old_size: int,
    new_size: int,
    old_root: bytes,
    new_root: bytes,
    proof: Sequence[bytes],
    match: str | None = None,
) -> None:
    with pytest.raises(ProofError, match=match):
        verify_consistency(old_size, new_size, old_root, new_root, proof)


@pytest.mark.parametrize("n", range(1, 41))
def test_tampered_inclusion_proofs_fail(n: int) -> None:
    entries, store = big()
    good = root(store, n)
    extra = hashlib.sha256(b"extra").digest()
    wrong_sizes = 0
    for index in range(n):
        leaf = leaf_hash(entries[index])
        proof = inclusion_proof(store, index, n)
        verify_inclusion(leaf, index, n, proof, good)
        for pos in range(len(proof)):
            flipped = [*proof]
            flipped[pos] = flip(flipped[pos], 37 * pos + index)
            rejects_inclusion(leaf, index, n, flipped, good)
            rejects_inclusion(leaf, index, n, proof[:pos] + proof[pos + 1 :], good)
        # RFC 9162 section 2.1.3.2 step 4a: an element left over once sn is 0 fails.
        rejects_inclusion(leaf, index, n, [*proof, extra], good, match="longer")
        rejects_inclusion(leaf, index, n, [extra, *proof], good)
        rejects_inclusion(flip(leaf, index), index, n, proof, good)
        rejects_inclusion(leaf, index, n, proof, flip(good, index))
        # With distinct entries, no other index of the same tree takes this path.
        for other in range(-1, n + 2):
            if other != index:
                rejects_inclusion(leaf, other, n, proof, good)
        # The RFC's verifier binds the size through the path's length and shape, so a
        # size whose audit path has another length must fail. (A size with a path of
        # the same length may pass: the verifier cannot tell a leaf from a subtree.)
        for size in range(index + 1, 45):
            if len(naive_path(index, 0, size)) != len(proof):
                wrong_sizes += 1
                rejects_inclusion(leaf, index, size, proof, good)
    assert wrong_sizes > 0 or n == 1


@pytest.mark.parametrize("n", range(1, 41))
def test_tampered_consistency_proofs_fail(n: int) -> None:
    _, store = big()
    new = root(store, n)
    extra = hashlib.sha256(b"extra").digest()
    wrong_sizes = 0
    for m in range(1, n + 1):
        old = root(store, m)
        proof = consistency_proof(store, m, n)
        verify_consistency(m, n, old, new, proof)
        for pos in range(len(proof)):
            flipped = [*proof]
            flipped[pos] = flip(flipped[pos], 11 * pos + m)
            rejects_consistency(m, n, old, new, flipped)
            rejects_consistency(m, n, old, new, proof[:pos] + proof[pos + 1 :])
        # RFC 9162 section 2.1.4.2 step 6a: an element left over once sn is 0 fails.
        rejects_consistency(
            m, n, old, new, [*proof, extra], match="longer" if m < n else "equal sizes"
        )
        rejects_consistency(m, n, old, new, [extra, *proof])
        if m < n:
            # RFC 9162 section 2.1.4.2 step 1: an empty proof between sizes m < n fails.
            rejects_consistency(m, n, old, new, [], match="empty")
        rejects_consistency(m, n, flip(old, m), new, proof)
        rejects_consistency(m, n, old, flip(new, m), proof)
        if m != n:
            rejects_consistency(m, n, new, old, proof)
        rejects_consistency(0, n, old, new, proof)
        rejects_consistency(n + 1, n, old, new, proof)
        # As for audit paths: sizes whose RFC proof has another length must fail.
        for m2, n2 in [(m - 1, n), (m + 1, n), (m, n - 1), (m, n + 1), (m + 1, n + 1)]:
            if 0 < m2 <= n2 and len(naive_proof(m2, n2)) != len(proof):
                wrong_sizes += 1
                rejects_consistency(m2, n2, old, new, proof)
    assert wrong_sizes > 0 or n == 1


def test_malformed_hashes_are_proof_errors() -> None:
    entries, store = big()
    good = root(store, 5)
    proof = inclusion_proof(store, 2, 5)
    leaf = leaf_hash(entries[2])
    verify_inclusion(leaf, 2, 5, proof, good)
    rejects_inclusion(leaf[:31], 2, 5, proof, good)
    rejects_inclusion(leaf, 2, 5, proof, good + b"\x00")
    rejects_inclusion(leaf, 2, 5, [proof[0][:16], *proof[1:]], good)
    old = root(store, 3)
    cproof = consistency_proof(store, 3, 5)
    verify_consistency(3, 5, old, good, cproof)
    rejects_consistency(3, 5, old[:-1], good, cproof)
    rejects_consistency(3, 5, old, good, [cproof[0] + b"\x00", *cproof[1:]])
    # Equal sizes: PROOF(m, D[m]) is empty (RFC 9162 section 2.1.4.1).
    verify_consistency(5, 5, good, good, [])
    rejects_consistency(5, 5, good, root(store, 4), [])
    assert issubclass(ProofError, ValueError)


def test_proof_functions_validate_arguments() -> None:
    _, store = big()
    for index, size in [(-1, 5), (5, 5), (0, 0)]:
        with pytest.raises(ValueError, match="index"):
            inclusion_proof(store, index, size)
    for old, new in [(0, 5), (6, 5), (-1, 3)]:
        with pytest.raises(ValueError, match="old_size"):
            consistency_proof(store, old, new)
    with pytest.raises(ValueError, match="size"):
        root(store, -1)
    # A store with fewer leaves than asked for lacks subtrees.
    small = build(make_entries(5))
    with pytest.raises(KeyError):
        root(small, 6)
    with pytest.raises(KeyError):
        inclusion_proof(small, 0, 6)
    with pytest.raises(KeyError):
        consistency_proof(small, 2, 6)


# ------------------------------------------------- properties


@settings(max_examples=300, deadline=None)
@given(data=st.data(), n=st.integers(min_value=1, max_value=4096))
def test_proofs_always_verify(data: st.DataObject, n: int) -> None:
    entries, store = big()
    index = data.draw(st.integers(min_value=0, max_value=n - 1), label="index")
    m = data.draw(st.integers(min_value=1, max_value=n), label="old_size")
    new_root = root(store, n)
    verify_inclusion(
        leaf_hash(entries[index]), index, n, inclusion_proof(store, index, n), new_root
    )
    verify_consistency(m, n, root(store, m), new_root, consistency_proof(store, m, n))


@settings(max_examples=100, deadline=None)
@given(batches=st.lists(st.integers(min_value=0, max_value=40), max_size=12))
def test_batch_appends_store_what_single_appends_store(batches: list[int]) -> None:
    entries = make_entries(sum(batches), "batch")
    one_by_one = build([])
    for n, entry in enumerate(entries):
        one_by_one.put(append(one_by_one, n, [leaf_hash(entry)]))
    batched = MemoryStore()
    size = 0
    for count in batches:
        rows = append(batched, size, [leaf_hash(e) for e in entries[size : size + count]])
        assert len({(level, index) for level, index, _ in rows}) == len(rows)
        batched.put(rows)
        size += count
    assert batched.hashes == one_by_one.hashes
    assert root(batched, size) == naive_mth(entries)


# ------------------------------------------------- cost at a million leaves


def _log_sizes() -> list[int]:
    n = 1_000_000
    rng = Random(1_000_000)
    return sorted({1, 2, n // 2, 2**19, 2**19 + 1, n - 2, n - 1, *rng.sample(range(1, n), 60)})


def test_store_reads_are_logarithmic_at_a_million_leaves() -> None:
    n = 1_000_000
    counting = CountingStore(LazyStore(n))
    bound = 4 * math.log2(n)  # about 80

    counting.reads = 0
    root(counting, n)
    assert counting.reads == bin(n).count("1")

    started = time.perf_counter()
    worst_inclusion = worst_consistency = 0
    for index in [0, n - 1, *_log_sizes()]:
        index = min(index, n - 1)
        counting.reads = 0
        path = inclusion_proof(counting, index, n)
        assert len(path) == len(naive_path(index, 0, n))
        worst_inclusion = max(worst_inclusion, counting.reads)
    for old_size in [n, *_log_sizes()]:
        counting.reads = 0
        proof = consistency_proof(counting, old_size, n)
        assert len(proof) == len(naive_proof(old_size, n))
        worst_consistency = max(worst_consistency, counting.reads)
    elapsed = time.perf_counter() - started
    assert 0 < worst_inclusion < bound
    assert 0 < worst_consistency < bound
    proofs = 2 + 2 * len(_log_sizes())
    # Reported, not asserted: wall time depends on the machine.
    print(
        f"n={n}: worst reads inclusion={worst_inclusion} consistency={worst_consistency}; "
        f"{elapsed / proofs * 1e6:.0f} us per proof"
    )
