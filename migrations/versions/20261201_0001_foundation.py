"""Foundation: detector registry, interval counts, count conflicts, API keys.

Revision ID: 0001
Revises:
Create Date: 2026-12-01
"""

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_table(
        "detectors",
        sa.Column("detector_id", sa.String(64), nullable=False),
        sa.Column("label", sa.String(200), nullable=True),
        sa.Column("group_id", sa.String(64), nullable=True),
        sa.Column("road_class", sa.String(16), nullable=False),
        sa.Column("lanes", sa.Integer(), nullable=False),
        sa.Column("interval_s", sa.Integer(), nullable=False),
        sa.Column("timezone", sa.String(64), nullable=False),
        sa.Column("holiday_calendar", sa.String(16), nullable=True),
        sa.Column("lon", sa.Float(), nullable=True),
        sa.Column("lat", sa.Float(), nullable=True),
        sa.Column("capacity_per_lane_h", sa.Float(), nullable=True),
        sa.Column("created_s", sa.Float(), nullable=False),
        sa.Column("updated_s", sa.Float(), nullable=False),
        sa.CheckConstraint("lanes >= 1", name="ck_detectors_lanes_positive"),
        sa.CheckConstraint("interval_s >= 60 AND interval_s <= 3600",
                           name="ck_detectors_interval_range"),
        sa.CheckConstraint("road_class IN ('freeway', 'arterial', 'local')",
                           name="ck_detectors_road_class_known"),
        sa.PrimaryKeyConstraint("detector_id", name="pk_detectors"),
    )
    op.create_index("ix_detectors_group_id", "detectors", ["group_id"])
    op.create_table(
        "counts",
        sa.Column("detector_id", sa.String(64), nullable=False),
        sa.Column("start_s", sa.BigInteger(), nullable=False),
        sa.Column("count", sa.Integer(), nullable=False),
        sa.Column("received_s", sa.Float(), nullable=False),
        sa.ForeignKeyConstraint(["detector_id"], ["detectors.detector_id"], ondelete="CASCADE",
                                name="fk_counts_detector_id_detectors"),
        sa.PrimaryKeyConstraint("detector_id", "start_s", name="pk_counts"),
    )
    op.create_index("ix_counts_start_s", "counts", ["start_s"])
    op.create_table(
        "count_conflicts",
        sa.Column("conflict_id", sa.Integer(), autoincrement=True, nullable=False),
        sa.Column("detector_id", sa.String(64), nullable=False),
        sa.Column("start_s", sa.BigInteger(), nullable=False),
        sa.Column("stored_count", sa.Integer(), nullable=False),
        sa.Column("offered_count", sa.Integer(), nullable=False),
        sa.Column("received_s", sa.Float(), nullable=False),
        sa.ForeignKeyConstraint(["detector_id"], ["detectors.detector_id"], ondelete="CASCADE",
                                name="fk_count_conflicts_detector_id_detectors"),
        sa.PrimaryKeyConstraint("conflict_id", name="pk_count_conflicts"),
    )
    op.create_index("ix_count_conflicts_detector_start", "count_conflicts",
                    ["detector_id", "start_s"])
    op.create_table(
        "api_keys",
        sa.Column("key_id", sa.Integer(), autoincrement=True, nullable=False),
        sa.Column("name", sa.String(100), nullable=False),
        sa.Column("role", sa.String(16), nullable=False),
        sa.Column("key_hash", sa.String(64), nullable=False),
        sa.Column("created_s", sa.Float(), nullable=False),
        sa.Column("revoked_s", sa.Float(), nullable=True),
        sa.CheckConstraint("role IN ('ingest', 'read', 'operate', 'admin')",
                           name="ck_api_keys_role_known"),
        sa.PrimaryKeyConstraint("key_id", name="pk_api_keys"),
        sa.UniqueConstraint("name", name="uq_api_keys_name"),
        sa.UniqueConstraint("key_hash", name="uq_api_keys_key_hash"),
    )


def downgrade() -> None:
    op.drop_table("api_keys")
    op.drop_index("ix_count_conflicts_detector_start", table_name="count_conflicts")
    op.drop_table("count_conflicts")
    op.drop_index("ix_counts_start_s", table_name="counts")
    op.drop_table("counts")
    op.drop_index("ix_detectors_group_id", table_name="detectors")
    op.drop_table("detectors")
