"""Pair holds: a station found behind its partner (restore detection) stops serving;
partner marks: what each partner has shown it served, so a lost delivery shows.

Revision ID: 0008
Revises: 0007
Create Date: 2026-12-03
Reviewed by hand.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0008"
down_revision: str | None = "0007"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "pair_hold",
        sa.Column("id", sa.BigInteger().with_variant(sa.Integer(), "sqlite"), nullable=False),
        sa.Column("pair_id", sa.String(length=64), nullable=False),
        sa.Column("partner", sa.String(length=64), nullable=False, comment="the other station"),
        sa.Column(
            "behind",
            sa.String(length=8),
            nullable=False,
            comment="self: this station lost commits; partner: the other one did",
        ),
        sa.Column(
            "reason",
            sa.String(length=32),
            nullable=False,
            comment=(
                "owner_behind: the segments' owner; non_owner_behind: the other; "
                "deliveries_lost: keys served to slaves were forgotten"
            ),
        ),
        sa.Column("segments", sa.Integer(), nullable=False, comment="segments found behind"),
        sa.Column(
            "bytes_behind", sa.BigInteger(), nullable=False, comment="sum of the differences"
        ),
        sa.Column("detected_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("released_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("released_by", sa.String(length=64), nullable=True),
        sa.Column("release_reason", sa.String(length=255), nullable=True),
        sa.CheckConstraint("behind IN ('self', 'partner')", name=op.f("ck_pair_hold_behind")),
        sa.CheckConstraint(
            "reason IN ('owner_behind', 'non_owner_behind', 'deliveries_lost')",
            name=op.f("ck_pair_hold_reason"),
        ),
        sa.ForeignKeyConstraint(
            ["pair_id"], ["pair.pair_id"], name=op.f("fk_pair_hold_pair_id_pair")
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_pair_hold")),
    )
    op.create_index(
        "uq_pair_hold_open",
        "pair_hold",
        ["pair_id", "behind", "reason"],
        unique=True,
        sqlite_where=sa.text("released_at IS NULL"),
        postgresql_where=sa.text("released_at IS NULL"),
    )

    op.create_table(
        "partner_mark",
        sa.Column("pair_id", sa.String(length=64), nullable=False),
        sa.Column("partner", sa.String(length=64), nullable=False, comment="the other station"),
        sa.Column(
            "partner_fetched",
            sa.BigInteger(),
            nullable=False,
            comment="the highest count of served keys the partner has reported",
        ),
        sa.Column(
            "own_floor",
            sa.BigInteger(),
            nullable=False,
            comment="added to this station's own count after a release of deliveries_lost",
        ),
        sa.Column("seen_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["pair_id"], ["pair.pair_id"], name=op.f("fk_partner_mark_pair_id_pair")
        ),
        sa.PrimaryKeyConstraint("pair_id", "partner", name=op.f("pk_partner_mark")),
    )


def downgrade() -> None:
    op.drop_table("partner_mark")
    op.drop_index("uq_pair_hold_open", table_name="pair_hold")
    op.drop_table("pair_hold")
