"""Service health for monitoring and for clients that wait on the scoring backlog."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Response
from sqlalchemy import func, select, text

from .. import migrate, models
from ..alerting import scoring_backlog
from ..db import read_transaction
from ..deps import EngineDep, SettingsDep
from ..timefmt import format_utc

router = APIRouter(prefix="/v1", tags=["health"])
EXACT_COUNT_BELOW = 2_000_000


def _counts_stored(conn) -> tuple[int, bool]:  # type: ignore[no-untyped-def]
    """Exact below two million rows; a planner estimate above (exact counts scan the table)."""
    if conn.dialect.name == "sqlite":
        estimate = conn.execute(text("SELECT max(rowid) FROM counts")).scalar() or 0
    else:
        estimate = conn.execute(
            text("SELECT reltuples::bigint FROM pg_class WHERE relname = 'counts'")).scalar() or 0
    if estimate < EXACT_COUNT_BELOW:
        return conn.execute(select(func.count()).select_from(models.counts)).scalar_one(), True
    return int(estimate), False


@router.get("/health")
def health(engine: EngineDep, settings: SettingsDep, response: Response) -> dict[str, Any]:
    """Database reachability, schema revision, counts stored, latest interval, scoring backlog."""
    head = migrate.head_revision(settings.database_url)
    try:
        current = migrate.current_revision(engine)
        with read_transaction(engine) as conn:
            stored, exact = _counts_stored(conn)
            latest = conn.execute(select(func.max(models.counts.c.start_s))).scalar()
            detectors = conn.execute(select(func.count()).select_from(models.detectors)).scalar_one()
            backlog = scoring_backlog(conn, settings)
    except Exception as exc:  # noqa: BLE001 - health reports any database failure
        response.status_code = 503
        return {"status": "unavailable", "database": "unreachable", "error": type(exc).__name__,
                "migration": {"head": head}}
    ok = current == head
    if not ok:
        response.status_code = 503
    return {
        "status": "ok" if ok else "migration_pending",
        "database": engine.dialect.name,
        "migration": {"current": current, "head": head},
        "detectors": detectors,
        "counts_stored": stored,
        "counts_stored_exact": exact,
        "latest_interval": format_utc(latest) if latest is not None else None,
        "scoring_backlog": backlog,
        "clock": settings.clock,
    }

