"""Tables. Alembic owns the schema (see ``migrations/``); this module only describes it.

All interval times are stored as UTC epoch seconds (``*_s`` integer columns): the
detector's time zone is applied only when time of day or day type is needed.
"""

from __future__ import annotations

from sqlalchemy import (
    BigInteger,
    CheckConstraint,
    Column,
    Float,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Table,
)

NAMING = {
    "ix": "ix_%(table_name)s_%(column_0_N_name)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}
metadata = MetaData(naming_convention=NAMING)

ROAD_CLASSES = ("freeway", "arterial", "local")
ROLES = ("ingest", "read", "operate", "admin")

detectors = Table(
    "detectors",
    metadata,
    Column("detector_id", String(64), primary_key=True),
    Column("label", String(200), nullable=True),
    Column("group_id", String(64), nullable=True, index=True),
    Column("road_class", String(16), nullable=False),
    Column("lanes", Integer, nullable=False),
    Column("interval_s", Integer, nullable=False),
    Column("timezone", String(64), nullable=False),
    Column("holiday_calendar", String(16), nullable=True),
    Column("lon", Float, nullable=True),
    Column("lat", Float, nullable=True),
    Column("capacity_per_lane_h", Float, nullable=True),
    Column("created_s", Float, nullable=False),
    Column("updated_s", Float, nullable=False),
    CheckConstraint("lanes >= 1", name="lanes_positive"),
    CheckConstraint("interval_s >= 60 AND interval_s <= 3600", name="interval_range"),
    CheckConstraint("road_class IN ('freeway', 'arterial', 'local')", name="road_class_known"),
)

counts = Table(
    "counts",
    metadata,
    Column("detector_id", String(64), ForeignKey("detectors.detector_id", ondelete="CASCADE"),
           primary_key=True),
    Column("start_s", BigInteger, primary_key=True),
    Column("count", Integer, nullable=False),
    Column("received_s", Float, nullable=False),
    Index("ix_counts_start_s", "start_s"),
)

count_conflicts = Table(
    "count_conflicts",
    metadata,
    Column("conflict_id", Integer, primary_key=True, autoincrement=True),
    Column("detector_id", String(64), ForeignKey("detectors.detector_id", ondelete="CASCADE"),
           nullable=False),
    Column("start_s", BigInteger, nullable=False),
    Column("stored_count", Integer, nullable=False),
    Column("offered_count", Integer, nullable=False),
    Column("received_s", Float, nullable=False),
    Index("ix_count_conflicts_detector_start", "detector_id", "start_s"),
)

api_keys = Table(
    "api_keys",
    metadata,
    Column("key_id", Integer, primary_key=True, autoincrement=True),
    Column("name", String(100), nullable=False, unique=True),
    Column("role", String(16), nullable=False),
    Column("key_hash", String(64), nullable=False, unique=True),
    Column("created_s", Float, nullable=False),
    Column("revoked_s", Float, nullable=True),
    CheckConstraint("role IN ('ingest', 'read', 'operate', 'admin')", name="role_known"),
)
