"""A registry generation: one counter that database triggers raise on every insert,
update or delete of the registry (nodes, QKD links, pairs, principals) and of pair holds,
whoever writes them; processes keep what they read of those tables while it holds.

Revision ID: 0011
Revises: 0010
Create Date: 2026-12-03
Reviewed by hand.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0011"
down_revision: str | None = "0010"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

#: The tables whose rows the per-process registry cache holds facts of.
WATCHED = ("registry_node", "qkd_link", "pair", "principal", "pair_hold")
_BUMP = "UPDATE registry_generation SET value = value + 1 WHERE id = 1"


def upgrade() -> None:
    op.create_table(
        "registry_generation",
        sa.Column("id", sa.Integer(), autoincrement=False, nullable=False),
        sa.Column("value", sa.BigInteger(), nullable=False),
        sa.CheckConstraint("id = 1", name=op.f("ck_registry_generation_one_row")),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_registry_generation")),
    )
    op.execute("INSERT INTO registry_generation (id, value) VALUES (1, 0)")
    if op.get_bind().dialect.name == "sqlite":
        for table in WATCHED:
            for verb in ("INSERT", "UPDATE", "DELETE"):
                op.execute(
                    f"CREATE TRIGGER {table}_{verb.lower()}_generation AFTER {verb} ON {table} "
                    f"BEGIN {_BUMP}; END"
                )
        return
    op.execute(
        "CREATE FUNCTION keystrata_registry_changed() RETURNS trigger LANGUAGE plpgsql AS "
        f"$$ BEGIN {_BUMP}; RETURN NULL; END $$"
    )
    for table in WATCHED:
        op.execute(
            f"CREATE TRIGGER {table}_generation AFTER INSERT OR UPDATE OR DELETE ON {table} "
            "FOR EACH ROW EXECUTE FUNCTION keystrata_registry_changed()"
        )


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        for table in WATCHED:
            for verb in ("insert", "update", "delete"):
                op.execute(f"DROP TRIGGER {table}_{verb}_generation")
    else:
        for table in WATCHED:
            op.execute(f"DROP TRIGGER {table}_generation ON {table}")
        op.execute("DROP FUNCTION keystrata_registry_changed()")
    op.drop_table("registry_generation")
