"""Service health for monitoring and for clients that wait on the scoring backlog.

Monitoring polls this often, so every statement is an index look-up or a catalogue read:
no exact ``count(*)`` and no table scan. ``counts_stored`` and ``detectors`` are therefore the
database's own estimates (SQLite: the largest rowid, exact while rows are never deleted;
PostgreSQL: the live-tuple statistic or the planner's row estimate, whichever is larger —
current within seconds of a commit, or at once after ``ANALYZE``).

HTTP status: 200 while the API works (``status`` ``ok``, or ``degraded`` when scoring is not
keeping up: the API still stores counts and serves alerts, but new alerts may be late);
503 when the database is unreachable or the schema is not at the code's revision.
"""

from __future__ import annotations

import functools
from typing import Any, Literal

from fastapi import APIRouter, Response
from pydantic import BaseModel, Field
from sqlalchemy import Connection, text
from sqlalchemy.exc import DBAPIError

from service.store import migrations as migrate
from service.store.engine import read_transaction
from service.store.scoring import scoring_health
from service.timefmt import format_utc
from service.web.deps import EngineDep, SettingsDep

router = APIRouter(prefix="/v1", tags=["health"])


class MigrationState(BaseModel):
    current: str | None = Field(None, description="Revision the database is at.")
    head: str | None = Field(None, description="Revision this code expects.")


class FailingDetector(BaseModel):
    detector_id: str
    failures: int = Field(description="Scoring attempts failed in a row.")
    last_error: str | None = Field(description="The last failure, short (type: message).")
    failing_since: str | None = Field(description="When the first failure of the streak happened.")
    retry_at: str | None = Field(description="Earliest next attempt (backoff doubles per failure).")


class ScoringState(BaseModel):
    status: Literal["ok", "degraded"] = Field(
        description="'degraded' when a detector keeps failing or waiting work is not scored.")
    reasons: list[Literal["detectors_failing", "backlog_stalled"]] = Field(
        description="Why degraded: 'detectors_failing' (a detector failed 3 times in a row), "
        "'backlog_stalled' (work of a healthy detector has waited over 10 minutes).")
    backlog: int = Field(description="Detectors with scoring work waiting (retrying ones too).")
    retrying: int = Field(description="Detectors whose last scoring attempt failed.")
    oldest_unscored_age_s: float | None = Field(
        description="Age of the oldest interval waiting to be scored, seconds on the scoring "
        "clock (a late interval is as old as its start); null when nothing waits.")
    longest_wait_s: float | None = Field(
        description="How long the oldest waiting work of a detector that is not failing has "
        "waited, wall seconds; null when nothing waits.")
    failing: list[FailingDetector] = Field(
        description="Detectors whose scoring is failing, most failures first (at most 20).")


class HealthPublic(BaseModel):
    status: Literal["ok", "degraded", "migration_pending", "unavailable"] = Field(
        description="'ok'; 'degraded' (scoring behind or failing; HTTP 200); "
        "'migration_pending' or 'unavailable' (HTTP 503).")
    database: str = Field(description="'sqlite', 'postgresql', or 'unreachable'.")
    error: str | None = Field(None, description="The database error's type, when unreachable.")
    migration: MigrationState
    detectors: int | None = Field(None, description="Detectors registered (an estimate).")
    counts_stored: int | None = Field(None, description="Counts stored (an estimate).")
    counts_stored_exact: bool | None = Field(
        None, description="Always false: the figure is the database's estimate.")
    latest_interval: str | None = Field(None, description="Start of the latest stored interval.")
    scoring_backlog: int | None = Field(None, description="Same as scoring.backlog.")
    scoring: ScoringState | None = None
    clock: str | None = Field(None, description="Scoring clock: 'wall' or 'data'.")


@functools.lru_cache(maxsize=8)
def _head(database_url: str) -> str | None:
    """The code's head revision (read from the migration files once per process)."""
    return migrate.head_revision(database_url)


def _rows_estimate(dialect: str, table: str) -> str:
    """SQL for the database's own estimate of a table's rows: no scan. SQLite: the largest
    rowid (exact while rows are never deleted, as for counts and detectors); PostgreSQL: the
    live-tuple statistic or the planner's estimate, whichever is larger."""
    if dialect == "sqlite":
        return f"(SELECT max(rowid) FROM {table})"
    return ("(SELECT greatest(pg_stat_get_live_tuples(c.oid), c.reltuples::bigint, 0) "
            f"FROM pg_class c WHERE c.oid = '{table}'::regclass)")


def _stored(conn: Connection) -> tuple[int, int | None, int]:
    """(counts stored, latest interval start, detectors): estimates and an index-only max."""
    dialect = conn.dialect.name
    row = conn.execute(text(
        f"SELECT {_rows_estimate(dialect, 'counts')}, (SELECT max(start_s) FROM counts), "
        f"{_rows_estimate(dialect, 'detectors')}")).one()
    return int(row[0] or 0), row[1], int(row[2] or 0)


@router.get("/health", response_model=HealthPublic, response_model_exclude_unset=True)
def health(engine: EngineDep, settings: SettingsDep, response: Response) -> dict[str, Any]:
    """Database, schema revision, counts stored, latest interval, and how scoring keeps up."""
    head = _head(settings.database_url)
    try:
        with read_transaction(engine) as conn:
            current = conn.execute(text("SELECT version_num FROM alembic_version")).scalar()
            if current == head:
                stored, latest, detectors = _stored(conn)
                scoring = scoring_health(conn, settings)
    except DBAPIError:
        current = "?"  # not migrated at all (no version table), or the database is down
    if current != head:
        try:  # Alembic's own reading tells an empty database from an unreachable one
            current = migrate.current_revision(engine)
        except Exception as exc:  # noqa: BLE001 - health reports any database failure
            response.status_code = 503
            return {"status": "unavailable", "database": "unreachable",
                    "error": type(exc).__name__, "migration": {"head": head}}
        response.status_code = 503
        return {"status": "migration_pending", "database": engine.dialect.name,
                "migration": {"current": current, "head": head}}
    return {
        "status": scoring.status,
        "database": engine.dialect.name,
        "migration": {"current": current, "head": head},
        "detectors": detectors,
        "counts_stored": stored,
        "counts_stored_exact": False,
        "latest_interval": format_utc(latest) if latest is not None else None,
        "scoring_backlog": scoring.backlog,
        "scoring": {
            "status": scoring.status, "reasons": scoring.reasons, "backlog": scoring.backlog,
            "retrying": scoring.retrying,
            "oldest_unscored_age_s": scoring.oldest_unscored_age_s,
            "longest_wait_s": scoring.longest_wait_s,
            "failing": [{
                "detector_id": f["detector_id"], "failures": f["failures"],
                "last_error": f["last_error"],
                "failing_since": _utc(f["failing_since_s"]), "retry_at": _utc(f["retry_after_s"]),
            } for f in scoring.failing],
        },
        "clock": settings.clock,
    }


def _utc(t: float | None) -> str | None:
    return format_utc(t) if t is not None else None
