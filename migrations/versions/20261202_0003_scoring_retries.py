"""Scoring retries and waits: per-detector failure count, last error, retry time, wait start.

A detector whose scoring fails is retried with exponential backoff; the retry time lives in
the database so that every scorer process agrees. ``pending_since_s`` is the wall-clock time
at which the detector's oldest waiting work arrived, so ``GET /v1/health`` can tell a backlog
that drains from one that does not. The indexes keep health's questions to index look-ups.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02
"""

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None

_INDEXED = ("claimed_from_s", "scored_through_s", "failures", "pending_since_s")


def upgrade() -> None:
    with op.batch_alter_table("detector_state") as batch:
        batch.add_column(sa.Column("failures", sa.Integer(), nullable=False,
                                   server_default=sa.text("0")))
        batch.add_column(sa.Column("last_error", sa.String(300), nullable=True))
        batch.add_column(sa.Column("failing_since_s", sa.Float(), nullable=True))
        batch.add_column(sa.Column("retry_after_s", sa.Float(), nullable=True))
        batch.add_column(sa.Column("pending_since_s", sa.Float(), nullable=True))
    for column in _INDEXED:
        op.create_index(f"ix_detector_state_{column}", "detector_state", [column])
    # Detectors fitted but never scored: few, and an IS NULL look-up on the full
    # scored_through_s index is planned as a table scan once statistics show that most
    # detectors share one value.
    never = sa.text("scored_through_s IS NULL")
    op.create_index("ix_detector_state_never_scored", "detector_state", ["score_from_s"],
                    sqlite_where=never, postgresql_where=never)


def downgrade() -> None:
    op.drop_index("ix_detector_state_never_scored", table_name="detector_state")
    for column in _INDEXED:
        op.drop_index(f"ix_detector_state_{column}", table_name="detector_state")
    with op.batch_alter_table("detector_state") as batch:
        for column in ("pending_since_s", "retry_after_s", "failing_since_s", "last_error",
                       "failures"):
            batch.drop_column(column)
