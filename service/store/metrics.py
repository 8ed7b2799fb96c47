"""Figures the service reports about itself at ``GET /metrics``, read from the database at
scrape time: open alerts by kind and cause, and detectors by service state."""

from __future__ import annotations

from sqlalchemy import Connection, func, select

from service.store import tables

# The column that holds a detector's service state, when the schema has one; before it does,
# every detector is in service.
STATE_COLUMN = "service_state"
IN_SERVICE = "in_service"
SUPPRESSED_COLUMN = "suppressed"  # alerts kept but not shown (detector out of service)


def open_alerts_by_kind_cause(conn: Connection) -> dict[tuple[str, str], int]:
    """Open alerts an operator sees (not withdrawn; not suppressed, when the schema keeps
    suppressed alerts of detectors out of service) counted by (kind, cause)."""
    a = tables.alerts
    shown = [a.c.status == "open", a.c.withdrawn == 0]
    if SUPPRESSED_COLUMN in a.c:
        shown.append(a.c[SUPPRESSED_COLUMN] == 0)
    rows = conn.execute(select(a.c.kind, a.c.cause, func.count())
                        .where(*shown).group_by(a.c.kind, a.c.cause))
    return {(kind, cause): int(n) for kind, cause, n in rows}


def detectors_by_state(conn: Connection) -> dict[str, int]:
    """Registered detectors counted by service state."""
    d = tables.detectors
    if STATE_COLUMN not in d.c:
        return {IN_SERVICE: int(conn.execute(select(func.count()).select_from(d)).scalar_one())}
    state = d.c[STATE_COLUMN]
    rows = conn.execute(select(state, func.count()).group_by(state))
    return {str(name or IN_SERVICE): int(n) for name, n in rows}


def fit_job_seconds(conn: Connection) -> tuple[int, float]:
    """Fits done by fit jobs (any process: API inline runner or workers): how many, and their
    seconds in all."""
    i = tables.job_items
    n, total = conn.execute(select(func.count(i.c.seconds), func.coalesce(func.sum(i.c.seconds), 0.0))
                            .where(i.c.seconds.is_not(None))).one()
    return int(n), float(total)
