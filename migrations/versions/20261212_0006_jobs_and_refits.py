"""Long tasks as jobs, and each detector's refit schedule.

``jobs``: one row per long task asked for through the API (today: baseline fits), with its
state and when it was asked for, started and finished. ``job_items``: the job's work, one
row per detector, claimed by workers with a lease (``FOR UPDATE SKIP LOCKED`` on PostgreSQL)
so that several workers share a job and a killed worker's items are taken over when the lease
runs out; each item keeps its result (status, reason, baseline).

``refits``: when each detector's baseline is next due to be refitted (on the scoring clock),
the lease of the worker refitting it, and the outcome of the last attempt.

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-12
"""

import sqlalchemy as sa
from alembic import op

revision = "0006"
down_revision = "0005"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "jobs",
        sa.Column("job_id", sa.String(32), primary_key=True),
        sa.Column("kind", sa.String(16), nullable=False),
        sa.Column("state", sa.String(12), nullable=False),
        sa.Column("params", sa.Text(), nullable=False),
        sa.Column("total", sa.Integer(), nullable=False),
        sa.Column("created_by", sa.String(100), nullable=True),
        sa.Column("created_s", sa.Float(), nullable=False),
        sa.Column("started_s", sa.Float(), nullable=True),
        sa.Column("finished_s", sa.Float(), nullable=True),
        sa.CheckConstraint("state IN ('queued', 'running', 'done')", name="ck_jobs_state_known"),
        sa.CheckConstraint("kind IN ('fit')", name="ck_jobs_kind_known"),
    )
    op.create_index("ix_jobs_state", "jobs", ["state"])
    op.create_table(
        "job_items",
        sa.Column("job_id", sa.String(32),
                  sa.ForeignKey("jobs.job_id", ondelete="CASCADE",
                                name="fk_job_items_job_id_jobs"), primary_key=True),
        sa.Column("position", sa.Integer(), primary_key=True),
        sa.Column("detector_id", sa.String(64), nullable=False),
        sa.Column("status", sa.String(24), nullable=False),
        sa.Column("lease_until_s", sa.Float(), nullable=True),
        sa.Column("reason", sa.Text(), nullable=True),
        sa.Column("baseline_id", sa.Integer(), nullable=True),
        sa.Column("seconds", sa.Float(), nullable=True),
        sa.Column("finished_s", sa.Float(), nullable=True),
    )
    op.create_index("ix_job_items_job_id_status", "job_items", ["job_id", "status"])
    op.create_table(
        "refits",
        sa.Column("detector_id", sa.String(64),
                  sa.ForeignKey("detectors.detector_id", ondelete="CASCADE",
                                name="fk_refits_detector_id_detectors"), primary_key=True),
        sa.Column("due_s", sa.BigInteger(), nullable=False),
        sa.Column("lease_until_s", sa.Float(), nullable=True),
        sa.Column("attempted_s", sa.BigInteger(), nullable=True),
        sa.Column("status", sa.String(24), nullable=True),
        sa.Column("reason", sa.Text(), nullable=True),
        sa.Column("updated_s", sa.Float(), nullable=False),
    )
    op.create_index("ix_refits_due_s", "refits", ["due_s"])


def downgrade() -> None:
    op.drop_index("ix_refits_due_s", table_name="refits")
    op.drop_table("refits")
    op.drop_index("ix_job_items_job_id_status", table_name="job_items")
    op.drop_table("job_items")
    op.drop_index("ix_jobs_state", table_name="jobs")
    op.drop_table("jobs")
