"""Key delivery (ETSI GS QKD 014): keys allocated from pair key, at both stations.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02
Reviewed by hand.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0003"
down_revision: str | None = "0002"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "key_alloc",
        sa.Column("key_id", sa.String(length=36), nullable=False),
        sa.Column("pair_id", sa.String(length=64), nullable=False),
        sa.Column(
            "owner", sa.String(length=64), nullable=False, comment="station that allocated it"
        ),
        sa.Column("master_sae", sa.String(length=64), nullable=False),
        sa.Column("slaves", sa.Text(), nullable=False, comment="JSON list of slave SAE IDs"),
        sa.Column(
            "fetched_by", sa.Text(), nullable=False, comment="JSON list of slaves served here"
        ),
        sa.Column(
            "ranges", sa.Text(), nullable=False, comment="JSON: segment byte ranges it came from"
        ),
        sa.Column("size_bits", sa.Integer(), nullable=False),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("allocated_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("expires_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("settled_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("sealed", sa.LargeBinary(), nullable=True),
        sa.CheckConstraint(
            "(sealed IS NULL) = (state <> 'waiting')", name=op.f("ck_key_alloc_sealed_iff_waiting")
        ),
        sa.CheckConstraint(
            "state IN ('waiting', 'delivered', 'expired')", name=op.f("ck_key_alloc_state")
        ),
        sa.CheckConstraint("size_bits > 0 AND size_bits % 8 = 0", name=op.f("ck_key_alloc_size")),
        sa.ForeignKeyConstraint(
            ["pair_id"], ["pair.pair_id"], name=op.f("fk_key_alloc_pair_id_pair")
        ),
        sa.PrimaryKeyConstraint("key_id", name=op.f("pk_key_alloc")),
    )
    with op.batch_alter_table("key_alloc", schema=None) as batch_op:
        batch_op.create_index("ix_key_alloc_expiry", ["state", "expires_at"], unique=False)
        batch_op.create_index(
            "ix_key_alloc_pair_owner_time", ["pair_id", "owner", "allocated_at"], unique=False
        )


def downgrade() -> None:
    with op.batch_alter_table("key_alloc", schema=None) as batch_op:
        batch_op.drop_index("ix_key_alloc_pair_owner_time")
        batch_op.drop_index("ix_key_alloc_expiry")

    op.drop_table("key_alloc")
