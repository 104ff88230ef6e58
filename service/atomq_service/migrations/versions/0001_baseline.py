"""Baseline: the schema of atomq at commit 780447e, the last made without revisions.

A database made by that code (no version table) is stamped here when its tables match.

Revision ID: 0001
Revises: (none)
Created: 2026-12-02 19:20:35.220224
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "calculator",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(), nullable=False),
        sa.Column("version", sa.String(), nullable=False),
        sa.Column("backend", sa.String(), nullable=False),
        sa.Column("parameters", sa.JSON(), nullable=True),
        sa.Column("elements", sa.JSON(), nullable=True),
        sa.Column("weights_path", sa.String(), nullable=True),
        sa.Column("weights_sha256", sa.String(), nullable=True),
        sa.Column("weights_size", sa.Integer(), nullable=True),
        sa.Column("notes", sa.String(), nullable=False),
        sa.Column("retired", sa.Boolean(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("name", "version"),
    )
    with op.batch_alter_table("calculator", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_calculator_name"), ["name"], unique=False)
        batch_op.create_index(
            batch_op.f("ix_calculator_weights_sha256"), ["weights_sha256"], unique=False
        )

    op.create_table(
        "user",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(), nullable=False),
        sa.Column("role", sa.String(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id"),
    )
    with op.batch_alter_table("user", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_user_name"), ["name"], unique=True)

    op.create_table(
        "worker",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(), nullable=False),
        sa.Column("host", sa.String(), nullable=False),
        sa.Column("pid", sa.Integer(), nullable=False),
        sa.Column("concurrency", sa.Integer(), nullable=False),
        sa.Column("heartbeat_s", sa.Float(), nullable=False),
        sa.Column("calculators", sa.JSON(), nullable=False),
        sa.Column("unavailable", sa.JSON(), nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("last_seen", sa.DateTime(timezone=True), nullable=False),
        sa.Column("stopped_at", sa.DateTime(timezone=True), nullable=True),
        sa.PrimaryKeyConstraint("id"),
    )
    with op.batch_alter_table("worker", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_worker_last_seen"), ["last_seen"], unique=False)
        batch_op.create_index(batch_op.f("ix_worker_name"), ["name"], unique=True)

    op.create_table(
        "apitoken",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("user_id", sa.Integer(), nullable=False),
        sa.Column("token_sha256", sa.String(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("expires_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("revoked", sa.Boolean(), nullable=False),
        sa.ForeignKeyConstraint(
            ["user_id"],
            ["user.id"],
        ),
        sa.PrimaryKeyConstraint("id"),
    )
    with op.batch_alter_table("apitoken", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_apitoken_token_sha256"), ["token_sha256"], unique=True)
        batch_op.create_index(batch_op.f("ix_apitoken_user_id"), ["user_id"], unique=False)

    op.create_table(
        "batch",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("owner_id", sa.Integer(), nullable=False),
        sa.Column("calculator_id", sa.Integer(), nullable=False),
        sa.Column("calculator_ref", sa.String(), nullable=False),
        sa.Column("kind", sa.String(), nullable=False),
        sa.Column("size", sa.Integer(), nullable=False),
        sa.Column("idempotency_key", sa.String(), nullable=True),
        sa.Column("request_sha256", sa.String(), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["calculator_id"],
            ["calculator.id"],
        ),
        sa.ForeignKeyConstraint(
            ["owner_id"],
            ["user.id"],
        ),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("owner_id", "idempotency_key"),
    )
    with op.batch_alter_table("batch", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_batch_created_at"), ["created_at"], unique=False)
        batch_op.create_index(batch_op.f("ix_batch_owner_id"), ["owner_id"], unique=False)

    op.create_table(
        "comparison",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("owner_id", sa.Integer(), nullable=False),
        sa.Column("calculator_id", sa.Integer(), nullable=False),
        sa.Column("calculator_ref", sa.String(), nullable=False),
        sa.Column("selection", sa.String(), nullable=False),
        sa.Column("idempotency_key", sa.String(), nullable=True),
        sa.Column("request_sha256", sa.String(), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["calculator_id"],
            ["calculator.id"],
        ),
        sa.ForeignKeyConstraint(
            ["owner_id"],
            ["user.id"],
        ),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("owner_id", "idempotency_key"),
    )
    with op.batch_alter_table("comparison", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_comparison_calculator_id"), ["calculator_id"], unique=False
        )
        batch_op.create_index(
            batch_op.f("ix_comparison_calculator_ref"), ["calculator_ref"], unique=False
        )
        batch_op.create_index(batch_op.f("ix_comparison_created_at"), ["created_at"], unique=False)
        batch_op.create_index(batch_op.f("ix_comparison_owner_id"), ["owner_id"], unique=False)

    op.create_table(
        "job",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("owner_id", sa.Integer(), nullable=False),
        sa.Column("state", sa.String(), nullable=False),
        sa.Column("kind", sa.String(), nullable=False),
        sa.Column("calculator_id", sa.Integer(), nullable=False),
        sa.Column("calculator_ref", sa.String(), nullable=False),
        sa.Column("task", sa.JSON(), nullable=False),
        sa.Column("structure", sa.JSON(), nullable=False),
        sa.Column("natoms", sa.Integer(), nullable=False),
        sa.Column("formula", sa.String(), nullable=False),
        sa.Column("input_hash", sa.String(), nullable=False),
        sa.Column("seed", sa.BigInteger(), nullable=True),
        sa.Column("parents", sa.JSON(), nullable=False),
        sa.Column("time_limit_s", sa.Float(), nullable=False),
        sa.Column("attempts", sa.Integer(), nullable=False),
        sa.Column("lease_expires_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("cancel_requested", sa.Boolean(), nullable=False),
        sa.Column("idempotency_key", sa.String(), nullable=True),
        sa.Column("request_sha256", sa.String(), nullable=True),
        sa.Column("dispatched_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("reused_from", sa.Integer(), nullable=True),
        sa.Column("batch_id", sa.Integer(), nullable=True),
        sa.Column("batch_index", sa.Integer(), nullable=True),
        sa.Column("converged", sa.Boolean(), nullable=True),
        sa.Column("progress", sa.JSON(), nullable=True),
        sa.Column("error", sa.String(), nullable=True),
        sa.Column("worker", sa.String(), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("finished_at", sa.DateTime(timezone=True), nullable=True),
        sa.ForeignKeyConstraint(
            ["batch_id"],
            ["batch.id"],
        ),
        sa.ForeignKeyConstraint(
            ["calculator_id"],
            ["calculator.id"],
        ),
        sa.ForeignKeyConstraint(
            ["owner_id"],
            ["user.id"],
        ),
        sa.ForeignKeyConstraint(
            ["reused_from"],
            ["job.id"],
        ),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("owner_id", "idempotency_key"),
    )
    with op.batch_alter_table("job", schema=None) as batch_op:
        batch_op.create_index("ix_job_batch_state", ["batch_id", "state"], unique=False)
        batch_op.create_index(batch_op.f("ix_job_calculator_id"), ["calculator_id"], unique=False)
        batch_op.create_index(batch_op.f("ix_job_calculator_ref"), ["calculator_ref"], unique=False)
        batch_op.create_index(batch_op.f("ix_job_created_at"), ["created_at"], unique=False)
        batch_op.create_index(batch_op.f("ix_job_dispatched_at"), ["dispatched_at"], unique=False)
        batch_op.create_index(batch_op.f("ix_job_input_hash"), ["input_hash"], unique=False)
        batch_op.create_index(batch_op.f("ix_job_kind"), ["kind"], unique=False)
        batch_op.create_index("ix_job_owner_state", ["owner_id", "state"], unique=False)
        batch_op.create_index(batch_op.f("ix_job_reused_from"), ["reused_from"], unique=False)
        batch_op.create_index(batch_op.f("ix_job_state"), ["state"], unique=False)

    op.create_table(
        "artifact",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("job_id", sa.Integer(), nullable=False),
        sa.Column("attempt", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(), nullable=False),
        sa.Column("media_type", sa.String(), nullable=False),
        sa.Column("path", sa.String(), nullable=False),
        sa.Column("size", sa.Integer(), nullable=False),
        sa.Column("sha256", sa.String(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["job_id"],
            ["job.id"],
        ),
        sa.PrimaryKeyConstraint("id"),
    )
    with op.batch_alter_table("artifact", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_artifact_job_id"), ["job_id"], unique=False)

    op.create_table(
        "comparisonitem",
        sa.Column("comparison_id", sa.Integer(), nullable=False),
        sa.Column("baseline_job_id", sa.Integer(), nullable=False),
        sa.Column("candidate_job_id", sa.Integer(), nullable=False),
        sa.ForeignKeyConstraint(
            ["baseline_job_id"],
            ["job.id"],
        ),
        sa.ForeignKeyConstraint(
            ["candidate_job_id"],
            ["job.id"],
        ),
        sa.ForeignKeyConstraint(
            ["comparison_id"],
            ["comparison.id"],
        ),
        sa.PrimaryKeyConstraint("comparison_id", "baseline_job_id"),
    )
    with op.batch_alter_table("comparisonitem", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_comparisonitem_baseline_job_id"), ["baseline_job_id"], unique=False
        )
        batch_op.create_index(
            batch_op.f("ix_comparisonitem_candidate_job_id"), ["candidate_job_id"], unique=True
        )

    op.create_table(
        "jobattempt",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("job_id", sa.Integer(), nullable=False),
        sa.Column("attempt", sa.Integer(), nullable=False),
        sa.Column("worker", sa.String(), nullable=False),
        sa.Column("started_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("lease_expires_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("ended_at", sa.DateTime(timezone=True), nullable=True),
        sa.Column("outcome", sa.String(), nullable=True),
        sa.ForeignKeyConstraint(
            ["job_id"],
            ["job.id"],
        ),
        sa.PrimaryKeyConstraint("id"),
        sa.UniqueConstraint("job_id", "attempt"),
    )
    with op.batch_alter_table("jobattempt", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_jobattempt_job_id"), ["job_id"], unique=False)

    op.create_table(
        "jobpackage",
        sa.Column("job_id", sa.Integer(), nullable=False),
        sa.Column("package", sa.String(), nullable=False),
        sa.Column("version", sa.String(), nullable=False),
        sa.ForeignKeyConstraint(
            ["job_id"],
            ["job.id"],
        ),
        sa.PrimaryKeyConstraint("job_id", "package"),
    )
    with op.batch_alter_table("jobpackage", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_jobpackage_package"), ["package"], unique=False)
        batch_op.create_index(batch_op.f("ix_jobpackage_version"), ["version"], unique=False)

    op.create_table(
        "jobresult",
        sa.Column("job_id", sa.Integer(), nullable=False),
        sa.Column("result", sa.JSON(), nullable=False),
        sa.Column("provenance", sa.JSON(), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["job_id"],
            ["job.id"],
        ),
        sa.PrimaryKeyConstraint("job_id"),
    )
    op.create_table(
        "jobtag",
        sa.Column("job_id", sa.Integer(), nullable=False),
        sa.Column("tag", sa.String(), nullable=False),
        sa.ForeignKeyConstraint(
            ["job_id"],
            ["job.id"],
        ),
        sa.PrimaryKeyConstraint("job_id", "tag"),
    )
    with op.batch_alter_table("jobtag", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_jobtag_tag"), ["tag"], unique=False)


def downgrade() -> None:
    with op.batch_alter_table("jobtag", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_jobtag_tag"))

    op.drop_table("jobtag")
    op.drop_table("jobresult")
    with op.batch_alter_table("jobpackage", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_jobpackage_version"))
        batch_op.drop_index(batch_op.f("ix_jobpackage_package"))

    op.drop_table("jobpackage")
    with op.batch_alter_table("jobattempt", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_jobattempt_job_id"))

    op.drop_table("jobattempt")
    with op.batch_alter_table("comparisonitem", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_comparisonitem_candidate_job_id"))
        batch_op.drop_index(batch_op.f("ix_comparisonitem_baseline_job_id"))

    op.drop_table("comparisonitem")
    with op.batch_alter_table("artifact", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_artifact_job_id"))

    op.drop_table("artifact")
    with op.batch_alter_table("job", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_job_state"))
        batch_op.drop_index(batch_op.f("ix_job_reused_from"))
        batch_op.drop_index("ix_job_owner_state")
        batch_op.drop_index(batch_op.f("ix_job_kind"))
        batch_op.drop_index(batch_op.f("ix_job_input_hash"))
        batch_op.drop_index(batch_op.f("ix_job_dispatched_at"))
        batch_op.drop_index(batch_op.f("ix_job_created_at"))
        batch_op.drop_index(batch_op.f("ix_job_calculator_ref"))
        batch_op.drop_index(batch_op.f("ix_job_calculator_id"))
        batch_op.drop_index("ix_job_batch_state")

    op.drop_table("job")
    with op.batch_alter_table("comparison", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_comparison_owner_id"))
        batch_op.drop_index(batch_op.f("ix_comparison_created_at"))
        batch_op.drop_index(batch_op.f("ix_comparison_calculator_ref"))
        batch_op.drop_index(batch_op.f("ix_comparison_calculator_id"))

    op.drop_table("comparison")
    with op.batch_alter_table("batch", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_batch_owner_id"))
        batch_op.drop_index(batch_op.f("ix_batch_created_at"))

    op.drop_table("batch")
    with op.batch_alter_table("apitoken", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_apitoken_user_id"))
        batch_op.drop_index(batch_op.f("ix_apitoken_token_sha256"))

    op.drop_table("apitoken")
    with op.batch_alter_table("worker", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_worker_name"))
        batch_op.drop_index(batch_op.f("ix_worker_last_seen"))

    op.drop_table("worker")
    with op.batch_alter_table("user", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_user_name"))

    op.drop_table("user")
    with op.batch_alter_table("calculator", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_calculator_weights_sha256"))
        batch_op.drop_index(batch_op.f("ix_calculator_name"))

    op.drop_table("calculator")
