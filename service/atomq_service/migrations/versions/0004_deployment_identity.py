"""This installation's identity, made once: PROV identifiers carry it.

Revision ID: 0004
Revises: 0003
"""

from __future__ import annotations

import uuid
from datetime import UTC, datetime

import sqlalchemy as sa
from alembic import op

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None


def upgrade() -> None:
    table = op.create_table(
        "deployment",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("identity", sa.String(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id"),
    )
    op.bulk_insert(
        table, [{"id": 1, "identity": str(uuid.uuid4()), "created_at": datetime.now(UTC)}]
    )


def downgrade() -> None:
    op.drop_table("deployment")
