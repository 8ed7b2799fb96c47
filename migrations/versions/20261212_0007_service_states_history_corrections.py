"""Detector service states, an append-only alert history, count corrections.

- ``detectors``: ``service_state`` (``in_service``, ``out_of_service``, ``retired``), with who
  set it, why, when (wall clock and scoring clock) and, for ``out_of_service``, until when.
- ``alerts``: ``suppressed`` (raised while the detector was out of service), and an index on
  ``start_s`` for the list's time filters.
- ``alert_history``: acknowledgements, withdrawals of them and notes, appended, never changed.
  Existing acknowledgements are copied in as the first entry of their alert.
- ``count_corrections``: a stored count replaced by an admin: old and new value, reason, who
  and when.

Revision ID: 0007
Revises: 0006
Create Date: 2026-12-12
"""

import sqlalchemy as sa
from alembic import op

revision = "0007"
down_revision = "0006"
branch_labels = None
depends_on = None

# Written out, not imported: a migration states the schema of its revision (they equal
# service.domain.SERVICE_STATES and HISTORY_ACTIONS).
SERVICE_STATE_CHECK = "service_state IN ('in_service', 'out_of_service', 'retired')"
ACTION_CHECK = "action IN ('acknowledge', 'unacknowledge', 'note')"


def upgrade() -> None:
    with op.batch_alter_table("detectors") as batch:
        batch.add_column(sa.Column("service_state", sa.String(16), nullable=False,
                                   server_default="in_service"))
        batch.add_column(sa.Column("service_reason", sa.Text(), nullable=True))
        batch.add_column(sa.Column("service_by", sa.String(100), nullable=True))
        batch.add_column(sa.Column("service_since_s", sa.Float(), nullable=True))
        batch.add_column(sa.Column("service_until_s", sa.Float(), nullable=True))
        batch.add_column(sa.Column("service_clock_s", sa.BigInteger(), nullable=True))
        batch.create_check_constraint("ck_detectors_service_state_known",
                                      sa.text(SERVICE_STATE_CHECK))
    op.create_index("ix_detectors_service_until_s", "detectors", ["service_until_s"])
    op.add_column("alerts", sa.Column("suppressed", sa.Integer(), nullable=False,
                                      server_default="0"))
    op.create_index("ix_alerts_start_s", "alerts", ["start_s"])
    op.create_table(
        "alert_history",
        sa.Column("entry_id", sa.Integer(), primary_key=True, autoincrement=True),
        sa.Column("alert_id", sa.Integer(), sa.ForeignKey(
            "alerts.alert_id", ondelete="CASCADE",
            name="fk_alert_history_alert_id_alerts"), nullable=False),
        sa.Column("action", sa.String(16), nullable=False),
        sa.Column("actor", sa.String(100), nullable=False),
        sa.Column("key_name", sa.String(100), nullable=True),
        sa.Column("at_s", sa.Float(), nullable=False),
        sa.Column("note", sa.Text(), nullable=True),
        sa.CheckConstraint(ACTION_CHECK, name="ck_alert_history_action_known"),
        sa.PrimaryKeyConstraint("entry_id", name="pk_alert_history"),
    )
    op.create_index("ix_alert_history_alert_id_entry_id", "alert_history",
                    ["alert_id", "entry_id"])
    op.execute("INSERT INTO alert_history (alert_id, action, actor, at_s, note) "
               "SELECT alert_id, 'acknowledge', acknowledged_by, acknowledged_s, ack_note "
               "FROM alerts WHERE acknowledged_by IS NOT NULL ORDER BY alert_id")
    op.create_table(
        "count_corrections",
        sa.Column("correction_id", sa.Integer(), primary_key=True, autoincrement=True),
        sa.Column("detector_id", sa.String(64), sa.ForeignKey(
            "detectors.detector_id", ondelete="CASCADE",
            name="fk_count_corrections_detector_id_detectors"), nullable=False),
        sa.Column("start_s", sa.BigInteger(), nullable=False),
        sa.Column("old_count", sa.Integer(), nullable=False),
        sa.Column("new_count", sa.Integer(), nullable=False),
        sa.Column("reason", sa.Text(), nullable=False),
        sa.Column("actor", sa.String(100), nullable=False),
        sa.Column("corrected_s", sa.Float(), nullable=False),
        sa.Column("conflict_id", sa.Integer(), nullable=True),
        sa.CheckConstraint("new_count >= 0", name="ck_count_corrections_new_count_not_negative"),
        sa.PrimaryKeyConstraint("correction_id", name="pk_count_corrections"),
    )
    op.create_index("ix_count_corrections_detector_id_correction_id", "count_corrections",
                    ["detector_id", "correction_id"])


def downgrade() -> None:
    op.drop_index("ix_count_corrections_detector_id_correction_id", "count_corrections")
    op.drop_table("count_corrections")
    op.drop_index("ix_alert_history_alert_id_entry_id", "alert_history")
    op.drop_table("alert_history")
    op.drop_index("ix_alerts_start_s", "alerts")
    with op.batch_alter_table("alerts") as batch:
        batch.drop_column("suppressed")
    op.drop_index("ix_detectors_service_until_s", "detectors")
    with op.batch_alter_table("detectors") as batch:
        batch.drop_constraint("ck_detectors_service_state_known", type_="check")
        for column in ("service_clock_s", "service_until_s", "service_since_s", "service_by",
                       "service_reason", "service_state"):
            batch.drop_column(column)
