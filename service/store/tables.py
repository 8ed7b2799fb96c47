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
    Text,
    text,
)

from service.domain import (
    HISTORY_ACTIONS,
    INTERVAL_CHECK_SQL,
    ROAD_CLASSES,
    ROLES,
    SERVICE_STATES,
    sql_in,
)

NAMING = {
    "ix": "ix_%(table_name)s_%(column_0_N_name)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}
metadata = MetaData(naming_convention=NAMING)

# Re-exported: the facts live in service.domain.
__all__ = ["ROAD_CLASSES", "ROLES", "metadata"]

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
    # The interval rule of service.domain (migration 0004 put it in place of a plain range).
    CheckConstraint(INTERVAL_CHECK_SQL, name="interval_allowed"),
    CheckConstraint(sql_in("road_class", ROAD_CLASSES), name="road_class_known"),
    # Service state (migration 0007): who set it, why, when (wall clock, and the scoring clock
    # that retirement cuts missing-data evidence at) and, out of service, until when.
    Column("service_state", String(16), nullable=False, server_default="in_service"),
    Column("service_reason", Text, nullable=True),
    Column("service_by", String(100), nullable=True),
    Column("service_since_s", Float, nullable=True),
    Column("service_until_s", Float, nullable=True, index=True),
    Column("service_clock_s", BigInteger, nullable=True),
    CheckConstraint(sql_in("service_state", SERVICE_STATES), name="service_state_known"),
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

# Hourly totals (UTC hours), kept after the raw intervals expire: vehicles, intervals reported
# and intervals flagged in ``evidence`` (on the scoring grid). See service.store.rollup.
# On PostgreSQL ``counts`` is partitioned by range of start_s (migration 0008; the
# partitions are managed by service.store.partitions), which this description leaves out.
count_hours = Table(
    "count_hours",
    metadata,
    Column("detector_id", String(64), ForeignKey("detectors.detector_id", ondelete="CASCADE"),
           primary_key=True),
    Column("hour_s", BigInteger, primary_key=True),
    Column("volume", BigInteger, nullable=False),
    Column("intervals", Integer, nullable=False),
    Column("flagged", Integer, nullable=False),
    Index("ix_count_hours_hour_s", "hour_s"),
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
    CheckConstraint(sql_in("role", ROLES), name="role_known"),
)

baselines = Table(
    "baselines",
    metadata,
    Column("baseline_id", Integer, primary_key=True, autoincrement=True),
    Column("detector_id", String(64), ForeignKey("detectors.detector_id", ondelete="CASCADE"),
           nullable=False),
    Column("fitted_s", Float, nullable=False),
    Column("as_of_s", BigInteger, nullable=False),
    Column("window_start_s", BigInteger, nullable=False),
    Column("window_end_s", BigInteger, nullable=False),
    Column("model", Text, nullable=False),  # JSON: baseline.Baseline.to_dict()
    Column("summary", Text, nullable=False),  # JSON: what a person reads about the fit
    Column("thresholds", Text, nullable=True),  # JSON: stats.thresholds.Thresholds for the budget in force
    Index("ix_baselines_detector_id_baseline_id", "detector_id", "baseline_id"),
)

# Per-detector scoring bookkeeping. Ingest lowers ``dirty_from_s`` in the same transaction
# that stores counts; scorers claim dirty rows and raise ``scored_through_s``.
detector_state = Table(
    "detector_state",
    metadata,
    Column("detector_id", String(64), ForeignKey("detectors.detector_id", ondelete="CASCADE"),
           primary_key=True),
    Column("baseline_id", Integer, ForeignKey("baselines.baseline_id", ondelete="SET NULL"),
           nullable=True),
    Column("score_from_s", BigInteger, nullable=True),
    Column("dirty_from_s", BigInteger, nullable=True),
    Column("claimed_from_s", BigInteger, nullable=True),  # what a scorer took from dirty_from_s
    Column("lease_until_s", Float, nullable=True),  # until when that scorer's claim holds
    Column("scored_through_s", BigInteger, nullable=True),
    Column("warm_state", Text, nullable=True),
    Column("updated_s", Float, nullable=False),
    # Failed scoring: consecutive failures, the last error (short), when the streak began and
    # when to retry (exponential backoff, shared by every scorer process).
    Column("failures", Integer, nullable=False, server_default="0"),
    Column("last_error", String(300), nullable=True),
    Column("failing_since_s", Float, nullable=True),
    Column("retry_after_s", Float, nullable=True),
    Column("pending_since_s", Float, nullable=True),  # wall time the oldest waiting work arrived
    Index("ix_detector_state_dirty_from_s", "dirty_from_s"),
    Index("ix_detector_state_claimed_from_s", "claimed_from_s"),
    Index("ix_detector_state_scored_through_s", "scored_through_s"),
    Index("ix_detector_state_failures", "failures"),
    Index("ix_detector_state_pending_since_s", "pending_since_s"),
    Index("ix_detector_state_never_scored", "score_from_s",
          sqlite_where=text("scored_through_s IS NULL"),
          postgresql_where=text("scored_through_s IS NULL")),
)

# Flagged intervals only (sparse): alert episodes are rebuilt from these.
evidence = Table(
    "evidence",
    metadata,
    Column("detector_id", String(64), ForeignKey("detectors.detector_id", ondelete="CASCADE"),
           primary_key=True),
    Column("start_s", BigInteger, primary_key=True),
    Column("kind", String(20), primary_key=True),
    Column("log_p", Float, nullable=False),
    Column("observed", Float, nullable=True),
    Column("expected", Float, nullable=True),
)

alerts = Table(
    "alerts",
    metadata,
    Column("alert_id", Integer, primary_key=True, autoincrement=True),
    Column("seq", BigInteger, nullable=False, unique=True),
    Column("subject", String(80), nullable=False),  # detector id, or "group:<id>" for a group alert
    Column("detector_id", String(64), ForeignKey("detectors.detector_id", ondelete="CASCADE"),
           nullable=True),
    Column("group_id", String(64), nullable=True),
    Column("kind", String(20), nullable=False),
    Column("cause", String(20), nullable=False),
    Column("status", String(10), nullable=False),
    Column("withdrawn", Integer, nullable=False, default=0),
    Column("start_s", BigInteger, nullable=False),
    Column("end_s", BigInteger, nullable=False),
    Column("closed_s", BigInteger, nullable=True),
    Column("observed", Float, nullable=True),
    Column("expected", Float, nullable=True),
    Column("log_p", Float, nullable=True),
    Column("n_intervals", Integer, nullable=False),
    Column("detectors", Text, nullable=True),  # JSON list, for group alerts
    Column("part_of", Integer, nullable=True),  # a detector's share of a group alert (hidden)
    Column("baseline_id", Integer, nullable=True),
    Column("summary", Text, nullable=False),
    Column("acknowledged_by", String(100), nullable=True),
    Column("acknowledged_s", Float, nullable=True),
    Column("ack_note", Text, nullable=True),
    Column("created_s", Float, nullable=False),
    Column("updated_s", Float, nullable=False),
    # Raised while the detector was out of service (migration 0007): hidden unless asked for.
    Column("suppressed", Integer, nullable=False, server_default="0"),
    Index("ix_alerts_start_s", "start_s"),
    Index("ix_alerts_subject_kind_start_s", "subject", "kind", "start_s", unique=True),
    Index("ix_alerts_detector_id_end_s", "detector_id", "end_s"),
    # Open alerts only (migration 0010): the network page reads them for every detector.
    Index("ix_alerts_open", "detector_id", "kind", sqlite_where=text("status = 'open'"),
          postgresql_where=text("status = 'open'")),
    # Polls with a filter, far behind the top seq (migration 0011)
    Index("ix_alerts_group_id_seq", "group_id", "seq"),
    Index("ix_alerts_kind_seq", "kind", "seq"),
    Index("ix_alerts_status_seq", "status", "seq"),
)

counters = Table(
    "counters",
    metadata,
    Column("name", String(40), primary_key=True),
    Column("value", BigInteger, nullable=False),
)

# Acknowledgements, their withdrawals and notes on an alert: appended, never changed
# (migration 0007). ``actor`` is the person or desk named in the request, ``key_name`` the
# API key that made it.
alert_history = Table(
    "alert_history",
    metadata,
    Column("entry_id", Integer, primary_key=True, autoincrement=True),
    Column("alert_id", Integer, ForeignKey("alerts.alert_id", ondelete="CASCADE"),
           nullable=False),
    Column("action", String(16), nullable=False),
    Column("actor", String(100), nullable=False),
    Column("key_name", String(100), nullable=True),
    Column("at_s", Float, nullable=False),
    Column("note", Text, nullable=True),
    CheckConstraint(sql_in("action", HISTORY_ACTIONS), name="action_known"),
    Index("ix_alert_history_alert_id_entry_id", "alert_id", "entry_id"),
)

# A stored count replaced by an admin (migration 0007): the audit trail of corrections.
count_corrections = Table(
    "count_corrections",
    metadata,
    Column("correction_id", Integer, primary_key=True, autoincrement=True),
    Column("detector_id", String(64), ForeignKey("detectors.detector_id", ondelete="CASCADE"),
           nullable=False),
    Column("start_s", BigInteger, nullable=False),
    Column("old_count", Integer, nullable=False),
    Column("new_count", Integer, nullable=False),
    Column("reason", Text, nullable=False),
    Column("actor", String(100), nullable=False),  # the API key's name
    Column("corrected_s", Float, nullable=False),
    Column("conflict_id", Integer, nullable=True),  # the conflict whose offered value was taken
    CheckConstraint("new_count >= 0", name="new_count_not_negative"),
    Index("ix_count_corrections_detector_id_correction_id", "detector_id", "correction_id"),
)

# Out-of-service periods of a detector (migration 0009): opened when it is taken out of
# service, closed when it returns (by a change or at its ``until``) or is retired. Times are on
# the scoring clock (wall time live, the data clock in replays), as count starts are; an
# interval whose start is in [from_s, to_s) is flagged out_of_service.
service_periods = Table(
    "service_periods",
    metadata,
    Column("period_id", Integer, primary_key=True, autoincrement=True),
    Column("detector_id", String(64), ForeignKey("detectors.detector_id", ondelete="CASCADE"),
           nullable=False),
    Column("from_s", Float, nullable=False),
    Column("to_s", Float, nullable=True),  # null while the period is open
    Column("reason", Text, nullable=True),
    Column("actor", String(100), nullable=True),  # the API key's name that opened it
    Column("closed_by", String(100), nullable=True),  # null when it ended by itself at until
    Index("ix_service_periods_detector_id_from_s", "detector_id", "from_s"),
)

# Long tasks asked for through the API (migration 0006): a job, and its work one detector a
# row, claimed by workers with a lease so several share a job and a killed one's items are
# taken over.
jobs = Table(
    "jobs",
    metadata,
    Column("job_id", String(32), primary_key=True),
    Column("kind", String(16), nullable=False),  # "fit"
    Column("state", String(12), nullable=False),  # queued, running, done
    Column("params", Text, nullable=False),  # JSON
    Column("total", Integer, nullable=False),
    Column("created_by", String(100), nullable=True),
    Column("created_s", Float, nullable=False),
    Column("started_s", Float, nullable=True),
    Column("finished_s", Float, nullable=True),
    CheckConstraint("state IN ('queued', 'running', 'done')", name="state_known"),
    CheckConstraint("kind IN ('fit')", name="kind_known"),
    Index("ix_jobs_state", "state"),
)

job_items = Table(
    "job_items",
    metadata,
    Column("job_id", String(32), ForeignKey("jobs.job_id", ondelete="CASCADE"),
           primary_key=True),
    Column("position", Integer, primary_key=True),
    Column("detector_id", String(64), nullable=False),
    Column("status", String(24), nullable=False),  # pending, or the fit's status
    Column("lease_until_s", Float, nullable=True),  # wall time a worker's claim holds until
    Column("reason", Text, nullable=True),
    Column("baseline_id", Integer, nullable=True),
    Column("seconds", Float, nullable=True),
    Column("finished_s", Float, nullable=True),
    Index("ix_job_items_job_id_status", "job_id", "status"),
)

# Each detector's refit schedule: when its next refit (or first fit) is due on the scoring
# clock, the lease of the worker doing it, and the last attempt's outcome.
refits = Table(
    "refits",
    metadata,
    Column("detector_id", String(64), ForeignKey("detectors.detector_id", ondelete="CASCADE"),
           primary_key=True),
    Column("due_s", BigInteger, nullable=False),
    Column("lease_until_s", Float, nullable=True),
    Column("attempted_s", BigInteger, nullable=True),  # scoring clock of the last attempt
    Column("status", String(24), nullable=True),
    Column("reason", Text, nullable=True),
    Column("updated_s", Float, nullable=False),
    Index("ix_refits_due_s", "due_s"),
)
