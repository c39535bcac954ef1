"""Signed ledger checkpoints (tree size, root hash, Ed25519 signature).

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02
Reviewed by hand.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0005"
down_revision: str | None = "0004"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "ledger_checkpoint",
        sa.Column("tree_size", sa.BigInteger(), autoincrement=False, nullable=False),
        sa.Column("root_hash", sa.LargeBinary(length=32), nullable=False),
        sa.Column("signed_text", sa.Text(), nullable=False),
        sa.Column("signature", sa.LargeBinary(length=64), nullable=False),
        sa.Column("signed_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("tree_size", name=op.f("pk_ledger_checkpoint")),
    )


def downgrade() -> None:
    op.drop_table("ledger_checkpoint")
