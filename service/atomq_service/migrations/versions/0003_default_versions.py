"""Each calculator name has a default version, decided explicitly and recorded.

Before, a bare name meant the active version registered last. The data step records
that version as each name's default, so nothing a lab submits changes meaning at the
upgrade; an admin changes it from then on (`atomq calculators default`).

Revision ID: 0003
Revises: 0002
"""

from __future__ import annotations

from datetime import UTC, datetime

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None

REASON = "what the bare name meant before default versions (the active version registered last)"


def upgrade() -> None:
    table = op.create_table(
        "defaultversion",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(), nullable=False),
        sa.Column("calculator_id", sa.Integer(), nullable=False),
        sa.Column("set_by_id", sa.Integer(), nullable=True),
        sa.Column("reason", sa.String(), nullable=False),
        sa.Column("set_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(["calculator_id"], ["calculator.id"]),
        sa.ForeignKeyConstraint(["set_by_id"], ["user.id"]),
        sa.PrimaryKeyConstraint("id"),
    )
    with op.batch_alter_table("defaultversion", schema=None) as batch_op:
        batch_op.create_index("ix_defaultversion_name_id", ["name", "id"], unique=False)

    calculator = sa.table(
        "calculator", sa.column("id", sa.Integer), sa.column("name", sa.String),
        sa.column("retired", sa.Boolean),
    )  # fmt: skip
    newest = (
        sa.select(calculator.c.name, sa.func.max(calculator.c.id))
        .where(calculator.c.retired == sa.false())
        .group_by(calculator.c.name)
        .order_by(calculator.c.name)
    )
    now = datetime.now(UTC)
    rows = [
        {"name": name, "calculator_id": calculator_id, "set_by_id": None, "reason": REASON,
         "set_at": now}
        for name, calculator_id in op.get_bind().execute(newest)
    ]  # fmt: skip
    if rows:
        op.bulk_insert(table, rows)


def downgrade() -> None:
    with op.batch_alter_table("defaultversion", schema=None) as batch_op:
        batch_op.drop_index("ix_defaultversion_name_id")
    op.drop_table("defaultversion")
