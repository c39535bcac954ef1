"""Ledger Merkle tree (RFC 9162): perfect-subtree hashes and the tree's right edge.

Builds the tree for entries written before this revision, in index order.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-02
Reviewed by hand.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

from keystrata.ledger import merkle
from keystrata.ledger.frontier import Frontier, positions

revision: str = "0004"
down_revision: str | None = "0003"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

BATCH = 10_000


def upgrade() -> None:
    node = op.create_table(
        "ledger_node",
        sa.Column("level", sa.Integer(), autoincrement=False, nullable=False),
        sa.Column("idx", sa.BigInteger(), autoincrement=False, nullable=False),
        sa.Column("hash", sa.LargeBinary(length=32), nullable=False),
        sa.PrimaryKeyConstraint("level", "idx", name=op.f("pk_ledger_node")),
    )
    with op.batch_alter_table("ledger_head", schema=None) as batch_op:
        batch_op.add_column(
            sa.Column(
                "frontier",
                sa.LargeBinary(),
                nullable=True,
                comment="hashes of the perfect subtrees decomposing [0, size)",
            )
        )
    # Entries written before the tree existed: add their leaves and subtrees in order.
    conn = op.get_bind()
    size = 0
    edge = Frontier(0, None)
    while True:
        rows = conn.execute(
            sa.text("SELECT idx, entry FROM ledger_entry WHERE idx >= :s ORDER BY idx LIMIT :n"),
            {"s": size, "n": BATCH},
        ).all()
        if not rows:
            break
        if rows[0][0] != size or rows[-1][0] != size + len(rows) - 1:
            raise RuntimeError("ledger entries are not numbered 0, 1, 2, ... without gaps")
        nodes = merkle.append(edge, size, [merkle.leaf_hash(bytes(r[1])) for r in rows])
        op.bulk_insert(node, [{"level": lv, "idx": ix, "hash": h} for lv, ix, h in nodes])
        blob = edge.advance(nodes, size + len(rows))
        size += len(rows)
        edge = Frontier(size, blob)
    conn.execute(
        sa.text("UPDATE ledger_head SET frontier = :f WHERE id = 1"),
        {"f": b"".join(edge.hashes[p] for p in positions(size)) or None},
    )


def downgrade() -> None:
    with op.batch_alter_table("ledger_head", schema=None) as batch_op:
        batch_op.drop_column("frontier")
    op.drop_table("ledger_node")
