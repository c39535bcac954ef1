"""A station's buffer report at the relay also holds the demand it could not meet: bits
its masters asked for in the window that were not ready.

Revision ID: 0010
Revises: 0009
Create Date: 2026-12-03
Reviewed by hand.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0010"
down_revision: str | None = "0009"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.add_column(
        "pair_buffer",
        sa.Column(
            "unmet_bits",
            sa.BigInteger(),
            server_default="0",
            nullable=False,
            comment="asked for and not ready, in the window",
        ),
    )


def downgrade() -> None:
    op.drop_column("pair_buffer", "unmet_bits")
