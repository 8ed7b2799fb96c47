"""Out-of-service periods of each detector, kept after the detector returns to service.

- ``service_periods``: one row per period a detector was out of service: from and to (on the
  scoring clock, as count starts are; ``to_s`` null while open), the reason, who opened it and
  who closed it (null when it ended by itself at its ``until``).
- Backfill: a detector out of service now gets an open period from when it was set so (the
  scoring clock then, or the wall clock when that was not recorded).

Downgrade drops the table (the detectors' current states are untouched).

Revision ID: 0009
Revises: 0008
Create Date: 2026-12-13
"""

import sqlalchemy as sa
from alembic import op

revision = "0009"
down_revision = "0008"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "service_periods",
        sa.Column("period_id", sa.Integer(), primary_key=True, autoincrement=True),
        sa.Column("detector_id", sa.String(64), sa.ForeignKey(
            "detectors.detector_id", ondelete="CASCADE",
            name="fk_service_periods_detector_id_detectors"), nullable=False),
        sa.Column("from_s", sa.Float(), nullable=False),
        sa.Column("to_s", sa.Float(), nullable=True),
        sa.Column("reason", sa.Text(), nullable=True),
        sa.Column("actor", sa.String(100), nullable=True),
        sa.Column("closed_by", sa.String(100), nullable=True),
        sa.PrimaryKeyConstraint("period_id", name="pk_service_periods"),
    )
    op.create_index("ix_service_periods_detector_id_from_s", "service_periods",
                    ["detector_id", "from_s"])
    op.execute("INSERT INTO service_periods (detector_id, from_s, to_s, reason, actor) "
               "SELECT detector_id, COALESCE(service_clock_s, service_since_s, updated_s), "
               "NULL, service_reason, service_by FROM detectors "
               "WHERE service_state = 'out_of_service' ORDER BY detector_id")


def downgrade() -> None:
    op.drop_index("ix_service_periods_detector_id_from_s", "service_periods")
    op.drop_table("service_periods")
