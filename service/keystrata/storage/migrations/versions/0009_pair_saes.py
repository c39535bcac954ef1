"""Pairs name the SAEs that may be master and slave in them, and a daily quota per SAE.

Revision ID: 0009
Revises: 0008
Create Date: 2026-12-02
Reviewed by hand.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0009"
down_revision: str | None = "0008"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    # SQLite cannot add a constraint to a table: batch mode copies it.
    with op.batch_alter_table("pair") as batch:
        batch.add_column(
            sa.Column(
                "masters",
                sa.JSON(none_as_null=True),
                nullable=True,
                comment="SAE IDs that may be master in this pair; NULL: any SAE of its stations",
            )
        )
        batch.add_column(
            sa.Column(
                "slaves",
                sa.JSON(none_as_null=True),
                nullable=True,
                comment="SAE IDs that may be slave in this pair; NULL: any SAE of its stations",
            )
        )
        batch.add_column(
            sa.Column(
                "sae_daily_quota_bits",
                sa.BigInteger(),
                nullable=True,
                comment="bits one master SAE may take per UTC day; NULL: no such quota",
            )
        )
        batch.create_check_constraint(
            "sae_quota", "sae_daily_quota_bits IS NULL OR sae_daily_quota_bits > 0"
        )


def downgrade() -> None:
    with op.batch_alter_table("pair") as batch:
        batch.drop_constraint(op.f("ck_pair_sae_quota"), type_="check")
        batch.drop_column("sae_daily_quota_bits")
        batch.drop_column("slaves")
        batch.drop_column("masters")
