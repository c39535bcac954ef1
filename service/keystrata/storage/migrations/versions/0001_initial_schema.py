"""Initial schema: node metadata, registry, principals, link key blocks, ledger.

Revision ID: 0001
Revises:
Create Date: 2026-12-02
Reviewed by hand.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0001"
down_revision: str | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "ledger_entry",
        sa.Column("idx", sa.BigInteger(), autoincrement=False, nullable=False),
        sa.Column("recorded_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("event", sa.String(length=64), nullable=False),
        sa.Column(
            "entry", sa.LargeBinary(), nullable=False, comment="canonical JSON bytes (RFC 8785)"
        ),
        sa.PrimaryKeyConstraint("idx", name=op.f("pk_ledger_entry")),
    )
    with op.batch_alter_table("ledger_entry", schema=None) as batch_op:
        batch_op.create_index("ix_ledger_entry_event", ["event", "idx"], unique=False)
        batch_op.create_index(
            batch_op.f("ix_ledger_entry_recorded_at"), ["recorded_at"], unique=False
        )

    op.create_table(
        "ledger_head",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("size", sa.BigInteger(), nullable=False),
        sa.CheckConstraint("id = 1", name=op.f("ck_ledger_head_single_row")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_ledger_head")),
    )
    # The ledger starts empty; appends bump this single row, which serialises them.
    op.execute("INSERT INTO ledger_head (id, size) VALUES (1, 0)")
    op.create_table(
        "node_meta",
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column("value", sa.LargeBinary(), nullable=False),
        sa.PrimaryKeyConstraint("name", name=op.f("pk_node_meta")),
    )
    op.create_table(
        "registry_node",
        sa.Column("node_id", sa.String(length=64), nullable=False),
        sa.Column("role", sa.String(length=16), nullable=False),
        sa.Column(
            "url", sa.String(length=255), nullable=True, comment="base HTTPS URL of the node"
        ),
        sa.Column("description", sa.Text(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column(
            "retired_at",
            sa.DateTime(timezone=True),
            nullable=True,
            comment="set when retired; retired rows stay for the record and are never reused",
        ),
        sa.CheckConstraint("role IN ('relay', 'station')", name=op.f("ck_registry_node_role")),
        sa.PrimaryKeyConstraint("node_id", name=op.f("pk_registry_node")),
    )
    op.create_table(
        "pair",
        sa.Column("pair_id", sa.String(length=64), nullable=False),
        sa.Column("relay_id", sa.String(length=64), nullable=False),
        sa.Column("station_a", sa.String(length=64), nullable=False),
        sa.Column("station_b", sa.String(length=64), nullable=False),
        sa.Column("min_key_size", sa.Integer(), nullable=False, comment="bits"),
        sa.Column("max_key_size", sa.Integer(), nullable=False, comment="bits"),
        sa.Column("default_key_size", sa.Integer(), nullable=False, comment="bits"),
        sa.Column("buffer_min_bits", sa.BigInteger(), nullable=False),
        sa.Column("buffer_target_bits", sa.BigInteger(), nullable=False),
        sa.Column("buffer_max_bits", sa.BigInteger(), nullable=False),
        sa.Column(
            "daily_quota_bits",
            sa.BigInteger(),
            nullable=True,
            comment="bits of key each station may hand out per UTC day; NULL: no quota",
        ),
        sa.Column(
            "priority", sa.Integer(), nullable=False, comment="weight in max-min fair sharing"
        ),
        sa.Column(
            "max_epsilon",
            sa.Float(),
            nullable=True,
            comment="segments whose composed security parameter exceeds this are not made",
        ),
        sa.Column("key_ttl_seconds", sa.Integer(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column(
            "retired_at",
            sa.DateTime(timezone=True),
            nullable=True,
            comment="set when retired; retired rows stay for the record and are never reused",
        ),
        sa.CheckConstraint(
            "buffer_min_bits >= 0 AND buffer_min_bits <= buffer_target_bits AND buffer_target_bits <= buffer_max_bits",
            name=op.f("ck_pair_buffer"),
        ),
        sa.CheckConstraint(
            "daily_quota_bits IS NULL OR daily_quota_bits > 0", name=op.f("ck_pair_quota")
        ),
        sa.CheckConstraint("key_ttl_seconds > 0", name=op.f("ck_pair_ttl")),
        sa.CheckConstraint("max_epsilon IS NULL OR max_epsilon > 0", name=op.f("ck_pair_epsilon")),
        sa.CheckConstraint(
            "min_key_size >= 8 AND min_key_size % 8 = 0 AND max_key_size % 8 = 0 AND default_key_size % 8 = 0 AND min_key_size <= default_key_size AND default_key_size <= max_key_size",
            name=op.f("ck_pair_key_sizes"),
        ),
        sa.CheckConstraint("priority BETWEEN 1 AND 1000", name=op.f("ck_pair_priority")),
        sa.CheckConstraint("station_a < station_b", name=op.f("ck_pair_ordered_stations")),
        sa.ForeignKeyConstraint(
            ["relay_id"], ["registry_node.node_id"], name=op.f("fk_pair_relay_id_registry_node")
        ),
        sa.ForeignKeyConstraint(
            ["station_a"], ["registry_node.node_id"], name=op.f("fk_pair_station_a_registry_node")
        ),
        sa.ForeignKeyConstraint(
            ["station_b"], ["registry_node.node_id"], name=op.f("fk_pair_station_b_registry_node")
        ),
        sa.PrimaryKeyConstraint("pair_id", name=op.f("pk_pair")),
    )
    op.create_table(
        "qkd_link",
        sa.Column("link_id", sa.String(length=64), nullable=False),
        sa.Column("relay_id", sa.String(length=64), nullable=False),
        sa.Column("station_id", sa.String(length=64), nullable=False),
        sa.Column("description", sa.Text(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column(
            "retired_at",
            sa.DateTime(timezone=True),
            nullable=True,
            comment="set when retired; retired rows stay for the record and are never reused",
        ),
        sa.CheckConstraint("relay_id <> station_id", name=op.f("ck_qkd_link_distinct_ends")),
        sa.ForeignKeyConstraint(
            ["relay_id"], ["registry_node.node_id"], name=op.f("fk_qkd_link_relay_id_registry_node")
        ),
        sa.ForeignKeyConstraint(
            ["station_id"],
            ["registry_node.node_id"],
            name=op.f("fk_qkd_link_station_id_registry_node"),
        ),
        sa.PrimaryKeyConstraint("link_id", name=op.f("pk_qkd_link")),
    )
    op.create_table(
        "link_block",
        sa.Column(
            "seq",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=True,
            nullable=False,
        ),
        sa.Column("link_id", sa.String(length=64), nullable=False),
        sa.Column(
            "block_id", sa.String(length=36), nullable=False, comment="UUID given by the QKD module"
        ),
        sa.Column("length", sa.Integer(), nullable=False, comment="bytes as received"),
        sa.Column("used", sa.Integer(), nullable=False, comment="bytes consumed, from the front"),
        sa.Column("qber", sa.Float(), nullable=False),
        sa.Column("epsilon", sa.Float(), nullable=False),
        sa.Column("produced_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("received_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column(
            "fingerprint",
            sa.LargeBinary(length=32),
            nullable=False,
            comment="HMAC of the bytes under a sealed node secret; spots re-sends",
        ),
        sa.Column(
            "sealed",
            sa.LargeBinary(),
            nullable=True,
            comment="bytes [used:length], sealed under the KEK; NULL once all used",
        ),
        sa.CheckConstraint(
            "(used = length) = (sealed IS NULL)", name=op.f("ck_link_block_sealed_iff_left")
        ),
        sa.CheckConstraint("epsilon >= 0 AND epsilon < 1", name=op.f("ck_link_block_epsilon")),
        sa.CheckConstraint("qber >= 0 AND qber <= 0.5", name=op.f("ck_link_block_qber")),
        sa.CheckConstraint("used >= 0 AND used <= length", name=op.f("ck_link_block_used")),
        sa.ForeignKeyConstraint(
            ["link_id"], ["qkd_link.link_id"], name=op.f("fk_link_block_link_id_qkd_link")
        ),
        sa.PrimaryKeyConstraint("seq", name=op.f("pk_link_block")),
        sa.UniqueConstraint("link_id", "block_id", name="uq_link_block_link_block"),
    )
    with op.batch_alter_table("link_block", schema=None) as batch_op:
        batch_op.create_index(
            "ix_link_block_available",
            ["link_id", "seq"],
            unique=False,
            sqlite_where=sa.text("used < length"),
            postgresql_where=sa.text("used < length"),
        )
        batch_op.create_index("ix_link_block_received", ["link_id", "received_at"], unique=False)

    op.create_table(
        "principal",
        sa.Column("principal_id", sa.String(length=64), nullable=False),
        sa.Column("role", sa.String(length=16), nullable=False),
        sa.Column(
            "cert_subject",
            sa.String(length=255),
            nullable=False,
            comment="subject common name of the client certificate",
        ),
        sa.Column(
            "cert_sha256",
            sa.String(length=64),
            nullable=True,
            comment="optional pin: hex SHA-256 of the certificate (DER)",
        ),
        sa.Column("station_id", sa.String(length=64), nullable=True),
        sa.Column("link_id", sa.String(length=64), nullable=True),
        sa.Column("node_id", sa.String(length=64), nullable=True),
        sa.Column("description", sa.Text(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column(
            "retired_at",
            sa.DateTime(timezone=True),
            nullable=True,
            comment="set when retired; retired rows stay for the record and are never reused",
        ),
        sa.CheckConstraint(
            "(role = 'peer') = (node_id IS NOT NULL)", name=op.f("ck_principal_peer_node")
        ),
        sa.CheckConstraint(
            "(role = 'qkd-module') = (link_id IS NOT NULL)", name=op.f("ck_principal_module_link")
        ),
        sa.CheckConstraint(
            "(role = 'sae') = (station_id IS NOT NULL)", name=op.f("ck_principal_sae_station")
        ),
        sa.CheckConstraint(
            "role IN ('sae', 'operator', 'auditor', 'peer', 'qkd-module')",
            name=op.f("ck_principal_role"),
        ),
        sa.ForeignKeyConstraint(
            ["link_id"], ["qkd_link.link_id"], name=op.f("fk_principal_link_id_qkd_link")
        ),
        sa.ForeignKeyConstraint(
            ["node_id"], ["registry_node.node_id"], name=op.f("fk_principal_node_id_registry_node")
        ),
        sa.ForeignKeyConstraint(
            ["station_id"],
            ["registry_node.node_id"],
            name=op.f("fk_principal_station_id_registry_node"),
        ),
        sa.PrimaryKeyConstraint("principal_id", name=op.f("pk_principal")),
    )
    with op.batch_alter_table("principal", schema=None) as batch_op:
        batch_op.create_index(
            "uq_principal_active_subject",
            ["cert_subject"],
            unique=True,
            sqlite_where=sa.text("retired_at IS NULL"),
            postgresql_where=sa.text("retired_at IS NULL"),
        )


def downgrade() -> None:
    with op.batch_alter_table("principal", schema=None) as batch_op:
        batch_op.drop_index(
            "uq_principal_active_subject",
            sqlite_where=sa.text("retired_at IS NULL"),
            postgresql_where=sa.text("retired_at IS NULL"),
        )

    op.drop_table("principal")
    with op.batch_alter_table("link_block", schema=None) as batch_op:
        batch_op.drop_index("ix_link_block_received")
        batch_op.drop_index(
            "ix_link_block_available",
            sqlite_where=sa.text("used < length"),
            postgresql_where=sa.text("used < length"),
        )

    op.drop_table("link_block")
    op.drop_table("qkd_link")
    op.drop_table("pair")
    op.drop_table("registry_node")
    op.drop_table("node_meta")
    op.drop_table("ledger_head")
    with op.batch_alter_table("ledger_entry", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_ledger_entry_recorded_at"))
        batch_op.drop_index("ix_ledger_entry_event")

    op.drop_table("ledger_entry")
