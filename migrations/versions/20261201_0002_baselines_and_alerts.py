"""Baselines, scoring state, sparse evidence, alerts and the alert sequence counter.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-01
"""

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "baselines",
        sa.Column("baseline_id", sa.Integer(), autoincrement=True, nullable=False),
        sa.Column("detector_id", sa.String(64), nullable=False),
        sa.Column("fitted_s", sa.Float(), nullable=False),
        sa.Column("as_of_s", sa.BigInteger(), nullable=False),
        sa.Column("window_start_s", sa.BigInteger(), nullable=False),
        sa.Column("window_end_s", sa.BigInteger(), nullable=False),
        sa.Column("model", sa.Text(), nullable=False),
        sa.Column("summary", sa.Text(), nullable=False),
        sa.Column("thresholds", sa.Text(), nullable=True),
        sa.ForeignKeyConstraint(["detector_id"], ["detectors.detector_id"], ondelete="CASCADE",
                                name="fk_baselines_detector_id_detectors"),
        sa.PrimaryKeyConstraint("baseline_id", name="pk_baselines"),
    )
    op.create_index("ix_baselines_detector_id_baseline_id", "baselines",
                    ["detector_id", "baseline_id"])
    op.create_table(
        "detector_state",
        sa.Column("detector_id", sa.String(64), nullable=False),
        sa.Column("baseline_id", sa.Integer(), nullable=True),
        sa.Column("score_from_s", sa.BigInteger(), nullable=True),
        sa.Column("dirty_from_s", sa.BigInteger(), nullable=True),
        sa.Column("claimed_from_s", sa.BigInteger(), nullable=True),
        sa.Column("lease_until_s", sa.Float(), nullable=True),
        sa.Column("scored_through_s", sa.BigInteger(), nullable=True),
        sa.Column("warm_state", sa.Text(), nullable=True),
        sa.Column("updated_s", sa.Float(), nullable=False),
        sa.ForeignKeyConstraint(["detector_id"], ["detectors.detector_id"], ondelete="CASCADE",
                                name="fk_detector_state_detector_id_detectors"),
        sa.ForeignKeyConstraint(["baseline_id"], ["baselines.baseline_id"], ondelete="SET NULL",
                                name="fk_detector_state_baseline_id_baselines"),
        sa.PrimaryKeyConstraint("detector_id", name="pk_detector_state"),
    )
    op.create_index("ix_detector_state_dirty_from_s", "detector_state", ["dirty_from_s"])
    op.create_table(
        "evidence",
        sa.Column("detector_id", sa.String(64), nullable=False),
        sa.Column("start_s", sa.BigInteger(), nullable=False),
        sa.Column("kind", sa.String(20), nullable=False),
        sa.Column("log_p", sa.Float(), nullable=False),
        sa.Column("observed", sa.Float(), nullable=True),
        sa.Column("expected", sa.Float(), nullable=True),
        sa.ForeignKeyConstraint(["detector_id"], ["detectors.detector_id"], ondelete="CASCADE",
                                name="fk_evidence_detector_id_detectors"),
        sa.PrimaryKeyConstraint("detector_id", "start_s", "kind", name="pk_evidence"),
    )
    op.create_table(
        "alerts",
        sa.Column("alert_id", sa.Integer(), autoincrement=True, nullable=False),
        sa.Column("seq", sa.BigInteger(), nullable=False),
        sa.Column("subject", sa.String(80), nullable=False),
        sa.Column("detector_id", sa.String(64), nullable=True),
        sa.Column("group_id", sa.String(64), nullable=True),
        sa.Column("kind", sa.String(20), nullable=False),
        sa.Column("cause", sa.String(20), nullable=False),
        sa.Column("status", sa.String(10), nullable=False),
        sa.Column("withdrawn", sa.Integer(), nullable=False),
        sa.Column("start_s", sa.BigInteger(), nullable=False),
        sa.Column("end_s", sa.BigInteger(), nullable=False),
        sa.Column("closed_s", sa.BigInteger(), nullable=True),
        sa.Column("observed", sa.Float(), nullable=True),
        sa.Column("expected", sa.Float(), nullable=True),
        sa.Column("log_p", sa.Float(), nullable=True),
        sa.Column("n_intervals", sa.Integer(), nullable=False),
        sa.Column("detectors", sa.Text(), nullable=True),
        sa.Column("part_of", sa.Integer(), nullable=True),
        sa.Column("baseline_id", sa.Integer(), nullable=True),
        sa.Column("summary", sa.Text(), nullable=False),
        sa.Column("acknowledged_by", sa.String(100), nullable=True),
        sa.Column("acknowledged_s", sa.Float(), nullable=True),
        sa.Column("ack_note", sa.Text(), nullable=True),
        sa.Column("created_s", sa.Float(), nullable=False),
        sa.Column("updated_s", sa.Float(), nullable=False),
        sa.ForeignKeyConstraint(["detector_id"], ["detectors.detector_id"], ondelete="CASCADE",
                                name="fk_alerts_detector_id_detectors"),
        sa.PrimaryKeyConstraint("alert_id", name="pk_alerts"),
        sa.UniqueConstraint("seq", name="uq_alerts_seq"),
    )
    op.create_index("ix_alerts_subject_kind_start_s", "alerts", ["subject", "kind", "start_s"],
                    unique=True)
    op.create_index("ix_alerts_detector_id_end_s", "alerts", ["detector_id", "end_s"])
    op.create_index("ix_alerts_group_id", "alerts", ["group_id"])
    op.create_table(
        "counters",
        sa.Column("name", sa.String(40), nullable=False),
        sa.Column("value", sa.BigInteger(), nullable=False),
        sa.PrimaryKeyConstraint("name", name="pk_counters"),
    )
    op.bulk_insert(sa.table("counters", sa.column("name", sa.String), sa.column("value", sa.BigInteger)),
                   [{"name": "alert_seq", "value": 0}])


def downgrade() -> None:
    op.drop_table("counters")
    op.drop_index("ix_alerts_group_id", table_name="alerts")
    op.drop_index("ix_alerts_detector_id_end_s", table_name="alerts")
    op.drop_index("ix_alerts_subject_kind_start_s", table_name="alerts")
    op.drop_table("alerts")
    op.drop_table("evidence")
    op.drop_index("ix_detector_state_dirty_from_s", table_name="detector_state")
    op.drop_table("detector_state")
    op.drop_index("ix_baselines_detector_id_baseline_id", table_name="baselines")
    op.drop_table("baselines")
