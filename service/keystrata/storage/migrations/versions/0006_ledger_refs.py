"""Ledger search references: which pair, SAE, key ID, node or segment an entry names.

Fills the table for entries written before this revision. (Entries from now on are
version 2, which also names the previous entry's leaf hash; older entries stay as they
were written: rewriting them would change the tree.)

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-02
Reviewed by hand.
"""

import json
from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

from keystrata.ledger.entries import references

revision: str = "0006"
down_revision: str | None = "0005"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

BATCH = 10_000


def upgrade() -> None:
    ref = op.create_table(
        "ledger_ref",
        sa.Column("kind", sa.String(length=8), nullable=False),
        sa.Column("value", sa.String(length=128), nullable=False),
        sa.Column("idx", sa.BigInteger(), autoincrement=False, nullable=False),
        sa.PrimaryKeyConstraint("kind", "value", "idx", name=op.f("pk_ledger_ref")),
    )
    conn = op.get_bind()
    start = 0
    while True:
        rows = conn.execute(
            sa.text("SELECT idx, entry FROM ledger_entry WHERE idx >= :s ORDER BY idx LIMIT :n"),
            {"s": start, "n": BATCH},
        ).all()
        if not rows:
            break
        found = [
            {"kind": str(kind), "value": value, "idx": idx}
            for idx, entry in rows
            for kind, value in references(json.loads(bytes(entry)))
        ]
        if found:
            op.bulk_insert(ref, found)
        start = rows[-1][0] + 1


def downgrade() -> None:
    op.drop_table("ledger_ref")
