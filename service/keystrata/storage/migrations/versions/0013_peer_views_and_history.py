"""Two tables for watching a network: what the last comparison of shared registry facts
with each peer found (names of differing facts, never values), and a compact time series
of link rates, pool levels, pair buffers and deliveries for the dashboard, with retention.

Revision ID: 0013
Revises: 0012
Create Date: 2026-12-04
Reviewed by hand.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0013"
down_revision: str | None = "0012"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "peer_registry_view",
        sa.Column("peer_id", sa.String(length=64), nullable=False),
        sa.Column(
            "checked_at",
            sa.DateTime(timezone=True),
            nullable=True,
            comment="the last comparison that got an answer (NULL: none has yet)",
        ),
        sa.Column(
            "disagreements",
            sa.Text(),
            nullable=False,
            comment="JSON list of {kind, id, field}: the shared facts the two nodes differ on",
        ),
        sa.Column("count", sa.Integer(), nullable=False, comment="how many facts differ"),
        sa.Column(
            "last_error",
            sa.String(length=255),
            nullable=True,
            comment="why the last attempt got no answer, if it failed",
        ),
        sa.PrimaryKeyConstraint("peer_id", name=op.f("pk_peer_registry_view")),
    )
    op.create_table(
        "history_sample",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("series", sa.String(length=32), nullable=False),
        sa.Column("subject", sa.String(length=64), nullable=False),
        sa.Column("value", sa.Float(), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_history_sample")),
    )
    op.create_index(op.f("ix_history_sample_at"), "history_sample", ["at"])
    op.create_index(
        "ix_history_sample_series_subject_at", "history_sample", ["series", "subject", "at"]
    )


def downgrade() -> None:
    op.drop_index("ix_history_sample_series_subject_at", table_name="history_sample")
    op.drop_index(op.f("ix_history_sample_at"), table_name="history_sample")
    op.drop_table("history_sample")
    op.drop_table("peer_registry_view")
