"""Service health for monitoring and for clients that wait on the scoring backlog.

Monitoring polls this often, so every statement is an index look-up or a catalog read
(``service.store.health``): ``counts_stored`` and ``detectors`` are the database's own
estimates.

HTTP status: 200 while the API works (``status`` ``ok``, or ``degraded`` when scoring is not
keeping up: the API still stores counts and serves alerts, but new alerts may be late);
503 when the database is unreachable or the schema is not at the code's revision.
"""

from __future__ import annotations

import functools
from typing import Any, Literal

from fastapi import APIRouter, Response
from pydantic import BaseModel, Field

from service.store import health as health_store
from service.store import migrations as migrate
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


@router.get("/health", response_model=HealthPublic, response_model_exclude_unset=True)
def health(engine: EngineDep, settings: SettingsDep, response: Response) -> dict[str, Any]:
    """Database, schema revision, counts stored, latest interval, and how scoring keeps up."""
    head = _head(settings.database_url)
    current, state = health_store.read_state(
        engine, head=head, also=lambda conn: scoring_health(conn, settings))
    if state is None:
        try:  # Alembic's own reading tells an empty database from an unreachable one
            current = migrate.current_revision(engine)
        except Exception as exc:  # noqa: BLE001 - health reports any database failure
            response.status_code = 503
            return {"status": "unavailable", "database": "unreachable",
                    "error": type(exc).__name__, "migration": {"head": head}}
        response.status_code = 503
        return {"status": "migration_pending", "database": engine.dialect.name,
                "migration": {"current": current, "head": head}}
    scoring = state.extra
    return {
        "status": scoring.status,
        "database": engine.dialect.name,
        "migration": {"current": current, "head": head},
        "detectors": state.detectors,
        "counts_stored": state.counts,
        "counts_stored_exact": False,
        "latest_interval": _utc(state.latest_start_s),
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
