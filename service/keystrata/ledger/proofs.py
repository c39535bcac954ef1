"""RFC 9162 proofs for auditors, over the stored tree at a size they name (or the
current size): an entry's inclusion, and the consistency of two sizes."""

from __future__ import annotations

from keystrata.context import NodeContext
from keystrata.errors import InvalidInput
from keystrata.ledger.chain import StoredTree


def _tree_size(tree: StoredTree, size: int | None, field: str) -> int:
    current, _ = tree.head()
    if size is None:
        return current
    if size > current:
        raise InvalidInput(
            f"{field}: the ledger holds {current} entries", details=[{"field": field}]
        )
    return size


def inclusion(ctx: NodeContext, index: int, tree_size: int | None) -> tuple[int, list[bytes]]:
    """The tree size used and the audit path of entry ``index`` in it.

    Raises:
        InvalidInput: the size is above the ledger's, or the index is not below it.
    """
    with ctx.db.read() as s:
        tree = StoredTree(s)
        size = _tree_size(tree, tree_size, "tree_size")
        if index >= size:
            raise InvalidInput(
                f"index: must be below tree_size {size}", details=[{"field": "index"}]
            )
        return size, tree.inclusion_proof(index, size)


def consistency(ctx: NodeContext, first: int, second: int | None) -> tuple[int, list[bytes]]:
    """The second size used and the consistency proof from ``first`` to it.

    Raises:
        InvalidInput: the second size is above the ledger's, or ``first`` is not in 1..second.
    """
    with ctx.db.read() as s:
        tree = StoredTree(s)
        size = _tree_size(tree, second, "second")
        if not 0 < first <= size:
            raise InvalidInput(f"first: must be between 1 and {size}", details=[{"field": "first"}])
        return size, tree.consistency_proof(first, size)
