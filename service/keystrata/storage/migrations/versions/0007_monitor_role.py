"""Principal role ``monitor``: health, readiness and metrics only.

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-02
Reviewed by hand.
"""

from collections.abc import Sequence

from alembic import op

revision: str = "0007"
down_revision: str | None = "0006"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

OLD = "role IN ('sae', 'operator', 'auditor', 'peer', 'qkd-module')"
NEW = "role IN ('sae', 'operator', 'auditor', 'peer', 'qkd-module', 'monitor')"


def _replace(condition: str) -> None:
    # SQLite cannot alter a constraint: batch mode copies the table.
    with op.batch_alter_table("principal", recreate="always") as batch:
        batch.drop_constraint(op.f("ck_principal_role"), type_="check")
        batch.create_check_constraint("role", condition)


def upgrade() -> None:
    _replace(NEW)


def downgrade() -> None:
    op.execute("DELETE FROM principal WHERE role = 'monitor'")
    _replace(OLD)
