"""The cheap statements behind ``GET /v1/health``.

Monitoring polls health often, so every statement here is an index look-up or a catalog
read: no exact ``count(*)`` and no table scan. Row counts are the database's own estimates
(SQLite: the largest rowid, exact while rows are never deleted; PostgreSQL: the live-tuple
statistic or the planner's row estimate, whichever is larger — current within seconds of a
commit, or at once after ``ANALYZE``).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Generic, TypeVar

from sqlalchemy import Connection, Engine, text
from sqlalchemy.exc import DBAPIError

from service.store.engine import read_transaction

T = TypeVar("T")


def rows_estimate_sql(dialect: str, table: str) -> str:
    """SQL for the database's own estimate of a table's rows: no scan."""
    if dialect == "sqlite":
        return f"(SELECT max(rowid) FROM {table})"
    return ("(SELECT greatest(pg_stat_get_live_tuples(c.oid), c.reltuples::bigint, 0) "
            f"FROM pg_class c WHERE c.oid = '{table}'::regclass)")


@dataclass(frozen=True)
class Stored(Generic[T]):
    """What the database holds, read when its schema is at the code's revision."""

    counts: int  # estimate
    latest_start_s: int | None  # start of the latest stored interval, UTC epoch seconds
    detectors: int  # estimate
    extra: T  # what the caller's ``also`` read in the same transaction


def stored(conn: Connection) -> tuple[int, int | None, int]:
    """(counts stored, latest interval start, detectors): estimates and an index-only max."""
    dialect = conn.dialect.name
    row = conn.execute(text(
        f"SELECT {rows_estimate_sql(dialect, 'counts')}, (SELECT max(start_s) FROM counts), "
        f"{rows_estimate_sql(dialect, 'detectors')}")).one()
    return int(row[0] or 0), row[1], int(row[2] or 0)


def read_state(engine: Engine, *, head: str | None, also: Callable[[Connection], T]
               ) -> tuple[str | None, Stored[T] | None]:
    """(revision the database is at, or "?" when the version table cannot be read; what it
    holds — None unless the revision is ``head``). ``also`` runs in the same read transaction
    (the scoring figures)."""
    try:
        with read_transaction(engine) as conn:
            current = conn.execute(text("SELECT version_num FROM alembic_version")).scalar()
            if current != head:
                return current, None
            counts, latest, detectors = stored(conn)
            return current, Stored(counts, latest, detectors, also(conn))
    except DBAPIError:
        return "?", None  # not migrated at all (no version table), or the database is down
