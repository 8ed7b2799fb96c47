"""Storage maintenance: partitions ahead of time, exact hourly totals, expiry of raw intervals.

``maintain_storage(engine, settings, now)`` is one idempotent pass, safe to run from several
processes at once (each step is one short transaction; PostgreSQL serializes the DDL) and as
often as wanted. ``tallyward maintain`` runs it once (from cron); a worker loop calls it every
few minutes. It:

1. PostgreSQL: creates the counts partitions from the clock to ``partition_ahead_days`` ahead,
   and moves rows that landed in the default partition into partitions of their own
   (``service.store.partitions``).
2. Recomputes the hourly totals of the last ``rollup_refresh_days`` from the raw intervals
   (``service.store.rollup``).
3. With ``raw_retention_days`` set: finalizes the hourly totals of the expiring intervals and
   removes them in the same transaction: whole partitions dropped on PostgreSQL, a bounded
   delete (``retention_batch_rows`` per transaction, oldest hours first) on SQLite and for
   stray rows in PostgreSQL's default partition.
4. PostgreSQL: vacuums and analyzes the scoring state and the registry, and analyzes the
   alerts (``service.store.scoring.vacuum_hot_tables``), in case autovacuum is off or behind.
"""

from __future__ import annotations

import logging
import time
from dataclasses import asdict, dataclass, field
from typing import Any

from sqlalchemy import Engine

from service.config import Settings
from service.store import partitions as parts
from service.store import rollup
from service.store.engine import read_transaction, write_transaction
from service.store.scoring import vacuum_hot_tables

__all__ = ["MaintenanceReport", "maintain_storage"]

log = logging.getLogger("tallyward.maintenance")

DAY_S = 86_400
HOUR_S = 3600


@dataclass
class MaintenanceReport:
    partitions_created: list[str] = field(default_factory=list)
    partitions_dropped: list[str] = field(default_factory=list)
    hours_refreshed: int = 0  # detector-hours recomputed from recent intervals
    rows_expired: int = 0  # raw intervals removed by a delete (dropped partitions not counted)
    expired_before_s: int | None = None  # raw intervals before this were expired
    vacuumed: list[str] = field(default_factory=list)  # PostgreSQL tables vacuumed/analyzed

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def maintain_storage(engine: Engine, settings: Settings, now: float | None = None
                     ) -> MaintenanceReport:
    """One maintenance pass at clock ``now`` (epoch s; default: wall time)."""
    now = time.time() if now is None else float(now)
    report = MaintenanceReport()
    with read_transaction(engine) as conn:
        partitioned = parts.is_partitioned(conn)
    if partitioned:
        _make_partitions(engine, settings, now, report)
    hi = rollup.floor_hour(now) + HOUR_S
    lo = rollup.floor_hour(now - settings.rollup_refresh_days * DAY_S)
    with write_transaction(engine) as conn:
        lo = max(lo, rollup.watermark(conn))
        if hi > lo:
            report.hours_refreshed = rollup.replace_hours(conn, lo, hi)
    if settings.raw_retention_days:
        cutoff = rollup.floor_hour(now - settings.raw_retention_days * DAY_S)
        report.expired_before_s = cutoff
        if partitioned:
            _drop_partitions(engine, cutoff, report)
        _delete_expired(engine, settings, cutoff, report)
    report.vacuumed = vacuum_hot_tables(engine)
    log.info("storage maintained", extra={"fields": report.to_dict()})
    return report


def _make_partitions(engine: Engine, settings: Settings, now: float,
                     report: MaintenanceReport) -> None:
    span = settings.partition_days * DAY_S
    ahead = (int(now), int(now) + settings.partition_ahead_days * DAY_S)
    with read_transaction(engine) as conn:  # most passes have nothing to make: no lock then
        if parts.default_span(conn) is None and not parts.missing_ranges(conn, *ahead,
                                                                          span_s=span):
            return
    with write_transaction(engine) as conn:
        parts.lock_counts(conn)  # before any read of a partition: see lock_counts
        stray = parts.default_span(conn)
        if stray is not None:
            report.partitions_created += parts.ensure_partitions(conn, *stray, span_s=span)
        report.partitions_created += parts.ensure_partitions(conn, *ahead, span_s=span)


def _drop_partitions(engine: Engine, cutoff: int, report: MaintenanceReport) -> None:
    """Drop each partition wholly before ``cutoff``, its hours finalized in the same
    transaction."""
    with read_transaction(engine) as conn:
        expired = [p for p in parts.partitions(conn) if p.hi_s <= cutoff]
    for part in expired:
        with write_transaction(engine) as conn:
            parts.lock_counts(conn)  # before finalize_hours reads the partition
            if part.name not in {p.name for p in parts.partitions(conn)}:
                continue  # another worker dropped it meanwhile
            rollup.finalize_hours(conn, part.lo_s, part.hi_s)
            parts.drop_partition(conn, part)
        report.partitions_dropped.append(part.name)


def _delete_expired(engine: Engine, settings: Settings, cutoff: int,
                    report: MaintenanceReport) -> None:
    """Remove raw intervals before ``cutoff`` a few hours at a time, oldest first: each
    transaction finalizes its hours and deletes at most about ``retention_batch_rows``."""
    while True:
        with write_transaction(engine) as conn:
            first = rollup.oldest_start(conn, before_s=cutoff)
            if first is None:
                return
            lo = rollup.floor_hour(first)
            per_hour = max(1, rollup.rows_between(conn, lo, lo + HOUR_S))
            hours = max(1, settings.retention_batch_rows // per_hour)
            hi = min(cutoff, lo + hours * HOUR_S)
            rollup.finalize_hours(conn, lo, hi)
            report.rows_expired += rollup.delete_counts(conn, lo, hi)
