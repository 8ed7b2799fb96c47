"""Jobs and refit schedules: the SQL behind long tasks run by workers.

A job (``jobs``) is split into items (``job_items``), one detector each. Workers claim items
with a lease (``FOR UPDATE SKIP LOCKED`` on PostgreSQL; SQLite serializes writers), so
several workers share one job and a killed worker's items are claimed again once their lease
runs out. An item keeps its result; a job is ``done`` when no item is pending.

A detector's refit schedule (``refits``) says when its next refit, or first fit, is due on
the scoring clock. Workers claim due rows the same way.
"""

from __future__ import annotations

import math
import time
import uuid
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import orjson
from sqlalchemy import Connection, Engine, exists, func, insert, or_, select, update

from service.store import tables
from service.store.engine import is_sqlite, read_transaction, write_transaction

JOB_LEASE_S = 300.0  # seconds a worker's claim on a job item holds (one detector's fit)
REFIT_LEASE_S = 300.0  # seconds a worker's claim on a refit holds
PENDING = "pending"
DAY_S = 86_400

__all__ = ["ItemClaim", "RefitClaim", "claim_items", "claim_refits", "create_job",
           "ensure_refit_rows", "finish_item", "finish_refit", "fit_state", "get_job",
           "release_refits"]


def create_job(engine: Engine, *, kind: str, detector_ids: Sequence[str],
               params: dict[str, Any], created_by: str | None) -> str:
    """Queue a job with one item per detector; its id."""
    job_id = uuid.uuid4().hex
    now = time.time()
    with write_transaction(engine) as conn:
        conn.execute(insert(tables.jobs).values(
            job_id=job_id, kind=kind, state="queued" if detector_ids else "done",
            params=orjson.dumps(params).decode(), total=len(detector_ids),
            created_by=created_by, created_s=now,
            started_s=None if detector_ids else now, finished_s=None if detector_ids else now))
        if detector_ids:
            conn.execute(insert(tables.job_items), [
                {"job_id": job_id, "position": i, "detector_id": det, "status": PENDING}
                for i, det in enumerate(detector_ids)])
    return job_id


@dataclass(frozen=True)
class ItemClaim:
    """One job item leased by a worker."""

    job_id: str
    position: int
    detector_id: str
    kind: str
    params: dict[str, Any]


def claim_items(engine: Engine, *, limit: int = 1, now: float | None = None) -> list[ItemClaim]:
    """Lease up to ``limit`` pending items, oldest job first."""
    j, i = tables.jobs, tables.job_items
    now = time.time() if now is None else now
    free = or_(i.c.lease_until_s.is_(None), i.c.lease_until_s < now)
    q = (select(i.c.job_id, i.c.position, i.c.detector_id, j.c.kind, j.c.params)
         .join(j, j.c.job_id == i.c.job_id)
         .where(j.c.state != "done", i.c.status == PENDING, free)
         .order_by(j.c.created_s, i.c.job_id, i.c.position).limit(limit))
    # Look first without the write lock: an idle worker must not queue behind ingest.
    with read_transaction(engine) as conn:
        if conn.execute(q).first() is None:
            return []
    with write_transaction(engine) as conn:
        if not is_sqlite(engine):
            q = q.with_for_update(of=i, skip_locked=True)
        rows = conn.execute(q).all()
        claims = []
        for r in rows:
            conn.execute(update(i).where(i.c.job_id == r.job_id, i.c.position == r.position)
                         .values(lease_until_s=now + JOB_LEASE_S))
            claims.append(ItemClaim(r.job_id, r.position, r.detector_id, r.kind,
                                    orjson.loads(r.params)))
        for job_id in {c.job_id for c in claims}:
            conn.execute(update(j).where(j.c.job_id == job_id, j.c.state == "queued")
                         .values(state="running", started_s=now))
    return claims


def finish_item(engine: Engine, claim: ItemClaim, result: dict[str, Any]) -> None:
    """Store one item's result; the job is done when it was the last pending item."""
    j, i = tables.jobs, tables.job_items
    now = time.time()
    with write_transaction(engine) as conn:
        conn.execute(update(i).where(i.c.job_id == claim.job_id, i.c.position == claim.position)
                     .values(status=result["status"], reason=result.get("reason"),
                             baseline_id=result.get("baseline_id"),
                             seconds=result.get("seconds"), lease_until_s=None, finished_s=now))
        left = conn.execute(select(func.count()).select_from(i).where(
            i.c.job_id == claim.job_id, i.c.status == PENDING)).scalar_one()
        if left == 0:
            conn.execute(update(j).where(j.c.job_id == claim.job_id, j.c.state != "done")
                         .values(state="done", finished_s=now))


def get_job(engine: Engine, job_id: str) -> dict[str, Any] | None:
    """A job with its progress and its items' results (in the order asked), or None."""
    j, i = tables.jobs, tables.job_items
    with read_transaction(engine) as conn:
        job = conn.execute(select(j).where(j.c.job_id == job_id)).first()
        if job is None:
            return None
        items = conn.execute(select(i.c.detector_id, i.c.status, i.c.reason, i.c.baseline_id,
                                    i.c.seconds)
                             .where(i.c.job_id == job_id).order_by(i.c.position)).all()
    results = [dict(r._mapping) for r in items]
    done = sum(r["status"] != PENDING for r in results)
    return {**dict(job._mapping), "params": orjson.loads(job.params), "done": done,
            "items": results}


# ----------------------------------------------------------------------------- refits


def ensure_refit_rows(engine: Engine) -> int:
    """Give every detector without one a refit schedule, due at once (the worker then decides
    whether it needs a first fit, a refit, or only its next date); how many were added."""
    d, r = tables.detectors, tables.refits
    missing = select(d.c.detector_id).where(~exists().where(r.c.detector_id == d.c.detector_id))
    with read_transaction(engine) as conn:
        if conn.execute(missing.limit(1)).first() is None:
            return 0
    now = time.time()
    with write_transaction(engine) as conn:
        ids = [row[0] for row in conn.execute(missing)]
        if not ids:
            return 0
        rows = [{"detector_id": x, "due_s": 0, "updated_s": now} for x in ids]
        if is_sqlite(engine):  # one writer at a time: nobody else is adding them
            conn.execute(insert(r), rows)
        else:  # another worker may be adding the same rows
            from sqlalchemy.dialects.postgresql import insert as pg_insert

            conn.execute(pg_insert(r).values(rows)
                         .on_conflict_do_nothing(index_elements=["detector_id"]))
    return len(ids)


@dataclass(frozen=True)
class RefitClaim:
    """A detector whose refit schedule is due, leased by a worker, with what deciding needs."""

    detector_id: str
    timezone: str
    baseline_id: int | None
    baseline_as_of_s: int | None
    history_s: int | None  # first stored interval's start to the latest one's end (no baseline)
    attempted_s: int | None


def claim_refits(engine: Engine, *, clock: float, limit: int = 32,
                 now: float | None = None) -> list[RefitClaim]:
    """Lease up to ``limit`` detectors whose refit schedule is due on the scoring clock."""
    r, d, s, b = tables.refits, tables.detectors, tables.detector_state, tables.baselines
    now = time.time() if now is None else now
    q = (select(r.c.detector_id, r.c.attempted_s).where(
        r.c.due_s <= clock, or_(r.c.lease_until_s.is_(None), r.c.lease_until_s < now))
        .order_by(r.c.due_s, r.c.detector_id).limit(limit))
    with read_transaction(engine) as conn:
        if conn.execute(q).first() is None:
            return []
    with write_transaction(engine) as conn:
        if not is_sqlite(engine):
            q = q.with_for_update(of=r, skip_locked=True)
        rows = conn.execute(q).all()
        if not rows:
            return []
        ids = [row.detector_id for row in rows]
        conn.execute(update(r).where(r.c.detector_id.in_(ids))
                     .values(lease_until_s=now + REFIT_LEASE_S))
        info = {row.detector_id: row for row in conn.execute(
            select(d.c.detector_id, d.c.timezone, d.c.interval_s, s.c.baseline_id, b.c.as_of_s)
            .select_from(d.outerjoin(s, s.c.detector_id == d.c.detector_id)
                         .outerjoin(b, b.c.baseline_id == s.c.baseline_id))
            .where(d.c.detector_id.in_(ids)))}
        claims = []
        for row in rows:
            det = info.get(row.detector_id)
            if det is None:
                continue
            history = None
            if det.baseline_id is None:
                history = history_s(conn, row.detector_id, interval_s=det.interval_s)
            claims.append(RefitClaim(row.detector_id, det.timezone, det.baseline_id,
                                     det.as_of_s, history, row.attempted_s))
    return claims


def history_s(conn: Connection, detector_id: str, *, interval_s: int) -> int | None:
    """Seconds from the start of the detector's first stored interval to the end of its
    latest (two index look-ups); None before its first count."""
    c = tables.counts
    first, last = conn.execute(select(func.min(c.c.start_s), func.max(c.c.start_s))
                               .where(c.c.detector_id == detector_id)).one()
    return None if first is None else int(last) + interval_s - int(first)


def finish_refit(engine: Engine, detector_id: str, *, due_s: int, attempted_s: int | None = None,
                 status: str | None = None, reason: str | None = None) -> None:
    """Release a refit claim: next due time and, after an attempt, its outcome."""
    r = tables.refits
    values: dict[str, Any] = {"due_s": int(due_s), "lease_until_s": None,
                              "updated_s": time.time()}
    if attempted_s is not None:
        values.update(attempted_s=int(attempted_s), status=status, reason=reason)
    with write_transaction(engine) as conn:
        conn.execute(update(r).where(r.c.detector_id == detector_id).values(**values))


def release_refits(engine: Engine, detector_ids: Sequence[str]) -> None:
    """Give back claims not worked on (another pass, or another worker, takes them)."""
    if not detector_ids:
        return
    r = tables.refits
    with write_transaction(engine) as conn:
        conn.execute(update(r).where(r.c.detector_id.in_(list(detector_ids)))
                     .values(lease_until_s=None))


def fit_state(conn: Connection, detector_id: str, *, first_fit_days: float) -> dict[str, Any]:
    """Whether a detector is scored or still learning (and how many more days of history its
    first fit needs: history is the span of its stored intervals), with its refit schedule."""
    s, r = tables.detector_state, tables.refits
    baseline_id = conn.execute(select(s.c.baseline_id).where(s.c.detector_id == detector_id)
                               ).scalar()
    sched = conn.execute(select(r.c.due_s, r.c.status, r.c.reason)
                         .where(r.c.detector_id == detector_id)).first()
    out: dict[str, Any] = {"baseline_id": baseline_id,
                           "next_refit_s": sched.due_s if sched is not None and sched.due_s
                           else None,
                           "last_fit_status": sched.status if sched is not None else None,
                           "last_fit_reason": sched.reason if sched is not None else None}
    if baseline_id is not None:
        return {**out, "state": "scored", "history_days": None, "days_needed": 0}
    step = conn.execute(select(tables.detectors.c.interval_s).where(
        tables.detectors.c.detector_id == detector_id)).scalar()
    span = history_s(conn, detector_id, interval_s=step) if step is not None else None
    history_days = span / DAY_S if span is not None else 0.0
    needed = max(0, math.ceil(round(first_fit_days - history_days, 6)))
    history_days = round(history_days, 2)
    return {**out, "state": "learning", "history_days": history_days, "days_needed": needed}

