"""Nodes and QKD links carry their physical profile for the link model: where a node is
(a relay: its platform's position, altitude, station-keeping circle and schedule; a
station: its position, sky brightness and clear-sky climatology) and a link's optics and
protocol. Both are optional JSON documents, checked by keystrata_physics.optics.

Revision ID: 0012
Revises: 0011
Create Date: 2026-12-03
Reviewed by hand.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0012"
down_revision: str | None = "0011"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.add_column(
        "registry_node",
        sa.Column(
            "physical",
            sa.JSON(none_as_null=True),
            nullable=True,
            comment="JSON: platform (relay) or station position and sky, for the link model",
        ),
    )
    op.add_column(
        "qkd_link",
        sa.Column(
            "optics",
            sa.JSON(none_as_null=True),
            nullable=True,
            comment="JSON: transmitter, receiver and protocol of the link, for the link model",
        ),
    )


def downgrade() -> None:
    op.drop_column("qkd_link", "optics")
    op.drop_column("registry_node", "physical")
