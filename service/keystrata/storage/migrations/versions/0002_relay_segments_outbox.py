"""Trusted relay: relay operations, pair key segments, outbox, leases, pair buffers.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02
Reviewed by hand.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0002"
down_revision: str | None = "0001"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "lease",
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column("holder", sa.String(length=128), nullable=False),
        sa.Column("expires_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("name", name=op.f("pk_lease")),
    )
    op.create_table(
        "outbox",
        sa.Column(
            "id",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=True,
            nullable=False,
        ),
        sa.Column("destination", sa.String(length=64), nullable=False),
        sa.Column("kind", sa.String(length=32), nullable=False),
        sa.Column("segment_id", sa.String(length=36), nullable=True),
        sa.Column(
            "body", sa.LargeBinary(), nullable=False, comment="JSON; never holds key material"
        ),
        sa.Column("attempts", sa.Integer(), nullable=False),
        sa.Column("due_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("claimed_until", sa.DateTime(timezone=True), nullable=True),
        sa.Column("last_error", sa.String(length=255), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_outbox")),
    )
    with op.batch_alter_table("outbox", schema=None) as batch_op:
        batch_op.create_index("ix_outbox_due", ["due_at"], unique=False)

    op.create_table(
        "pair_buffer",
        sa.Column("pair_id", sa.String(length=64), nullable=False),
        sa.Column("station", sa.String(length=64), nullable=False),
        sa.Column("ready_bits", sa.BigInteger(), nullable=False),
        sa.Column("owned_ready_bits", sa.BigInteger(), nullable=False),
        sa.Column("pending_bits", sa.BigInteger(), nullable=False),
        sa.Column(
            "delivered_bits", sa.BigInteger(), nullable=False, comment="in the report's window"
        ),
        sa.Column("window_seconds", sa.Integer(), nullable=False),
        sa.Column("reported_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["pair_id"], ["pair.pair_id"], name=op.f("fk_pair_buffer_pair_id_pair")
        ),
        sa.PrimaryKeyConstraint("pair_id", "station", name=op.f("pk_pair_buffer")),
    )
    op.create_table(
        "pair_segment",
        sa.Column("segment_id", sa.String(length=36), nullable=False),
        sa.Column("pair_id", sa.String(length=64), nullable=False),
        sa.Column(
            "side",
            sa.String(length=8),
            nullable=False,
            comment="notice: this station decides ready/discarded; cipher: it follows",
        ),
        sa.Column("partner", sa.String(length=64), nullable=False, comment="the other station"),
        sa.Column(
            "owner",
            sa.String(length=64),
            nullable=False,
            comment="station that serves it as master",
        ),
        sa.Column("length", sa.Integer(), nullable=False, comment="bytes of pair key"),
        sa.Column("used", sa.Integer(), nullable=False),
        sa.Column("epsilon", sa.Float(), nullable=False),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("reason", sa.String(length=64), nullable=True, comment="why it was discarded"),
        sa.Column(
            "link_applied",
            sa.Boolean(),
            nullable=False,
            comment="the relay's message naming this station's link bytes has been applied",
        ),
        sa.Column(
            "made_at", sa.DateTime(timezone=True), nullable=False, comment="when the relay made it"
        ),
        sa.Column("received_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("settled_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("sealed", sa.LargeBinary(), nullable=True),
        sa.CheckConstraint(
            "(sealed IS NULL) = (state = 'discarded' OR used = length)",
            name=op.f("ck_pair_segment_sealed_iff_live"),
        ),
        sa.CheckConstraint("side IN ('notice', 'cipher')", name=op.f("ck_pair_segment_side")),
        sa.CheckConstraint(
            "state IN ('pending', 'ready', 'discarded')", name=op.f("ck_pair_segment_state")
        ),
        sa.CheckConstraint("used >= 0 AND used <= length", name=op.f("ck_pair_segment_used")),
        sa.ForeignKeyConstraint(
            ["pair_id"], ["pair.pair_id"], name=op.f("fk_pair_segment_pair_id_pair")
        ),
        sa.PrimaryKeyConstraint("segment_id", name=op.f("pk_pair_segment")),
    )
    with op.batch_alter_table("pair_segment", schema=None) as batch_op:
        batch_op.create_index(
            "ix_pair_segment_pair_state", ["pair_id", "state", "owner"], unique=False
        )

    op.create_table(
        "relay_op",
        sa.Column("segment_id", sa.String(length=36), nullable=False),
        sa.Column("pair_id", sa.String(length=64), nullable=False),
        sa.Column(
            "notice_station",
            sa.String(length=64),
            nullable=False,
            comment="station A: told which of its link bytes form the segment",
        ),
        sa.Column(
            "cipher_station",
            sa.String(length=64),
            nullable=False,
            comment="station B: sent the ciphertext KA xor KB and its tag",
        ),
        sa.Column("owner", sa.String(length=64), nullable=False),
        sa.Column("length", sa.Integer(), nullable=False, comment="bytes of pair key"),
        sa.Column("epsilon", sa.Float(), nullable=False),
        sa.Column("ranges", sa.Text(), nullable=False, comment="JSON: link bytes used, per link"),
        sa.Column("state", sa.String(length=16), nullable=False),
        sa.Column("made_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("settled_at", sa.DateTime(timezone=True), nullable=True),
        sa.CheckConstraint(
            "state IN ('sent', 'ready', 'discarded')", name=op.f("ck_relay_op_state")
        ),
        sa.CheckConstraint(
            "notice_station <> cipher_station", name=op.f("ck_relay_op_two_stations")
        ),
        sa.ForeignKeyConstraint(
            ["pair_id"], ["pair.pair_id"], name=op.f("fk_relay_op_pair_id_pair")
        ),
        sa.PrimaryKeyConstraint("segment_id", name=op.f("pk_relay_op")),
    )
    with op.batch_alter_table("relay_op", schema=None) as batch_op:
        batch_op.create_index("ix_relay_op_pair_state", ["pair_id", "state"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("relay_op", schema=None) as batch_op:
        batch_op.drop_index("ix_relay_op_pair_state")

    op.drop_table("relay_op")
    with op.batch_alter_table("pair_segment", schema=None) as batch_op:
        batch_op.drop_index("ix_pair_segment_pair_state")

    op.drop_table("pair_segment")
    op.drop_table("pair_buffer")
    with op.batch_alter_table("outbox", schema=None) as batch_op:
        batch_op.drop_index("ix_outbox_due")

    op.drop_table("outbox")
    op.drop_table("lease")
