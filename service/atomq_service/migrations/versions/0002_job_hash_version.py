"""Jobs record the version of the canonical form their input hash was computed over.

Jobs recorded before keep their hash as it was (it is in their provenance) and read 1.

Revision ID: 0002
Revises: 0001
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("job", schema=None) as batch_op:
        batch_op.add_column(
            sa.Column("hash_version", sa.Integer(), server_default="1", nullable=False)
        )


def downgrade() -> None:
    with op.batch_alter_table("job", schema=None) as batch_op:
        batch_op.drop_column("hash_version")
