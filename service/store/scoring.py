"""The scoring pass's SQL: sequence numbers, claims with leases, backlog and health, scoring
state and retries, evidence rows, and alert rows.

Used by ``service.pipeline.score`` (the pass) and ``service.pipeline.reconcile`` (alerts from
evidence); that module's docstring tells how the pieces fit.

Why the sequence row lock: a poller asking for ``seq > N`` must never miss a change. If two
transactions drew sequence numbers freely, the larger could commit first and a poller could
pass the smaller one before it became visible. Holding the counter row from drawing a number
until commit makes commit order equal ``seq`` order.
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import orjson
from sqlalchemy import (
    Connection,
    Engine,
    and_,
    bindparam,
    case,
    delete,
    func,
    literal,
    or_,
    select,
    update,
)
from sqlalchemy.exc import DBAPIError

from service.config import Settings
from service.domain import (
    MIN_INTERVAL_S,
    MIN_WINDOW_INTERVAL_S,
    SHORT_INTERVAL_WINDOW_S,
    scoring_interval_s,
)
from service.store import tables as models
from service.store.alerts import next_seqs
from service.store.engine import is_sqlite, read_transaction, write_transaction

log = logging.getLogger("tallyward.scoring")

LEASE_S = 120.0  # seconds a claim holds a detector (default of TALLYWARD_WORKER_LEASE_S)
# Retry a detector whose scoring failed after RETRY_FIRST_S, doubling per consecutive failure up
# to RETRY_MAX_S. Module constants until they move to Settings.
RETRY_FIRST_S = 5.0  # seconds
RETRY_MAX_S = 900.0  # seconds
LAST_ERROR_CHARS = 300  # the detector_state.last_error column width
# Health calls scoring degraded when a detector failed this many times in a row, or when work
# has waited longer than STALLED_AFTER_S (wall seconds) without being scored.
DEGRADED_AFTER_FAILURES = 3
STALLED_AFTER_S = 600.0


def mark_dirty(conn: Connection, result: Any) -> None:
    """Ingest hook: note the earliest newly stored interval of each detector with a baseline,
    and since when (wall clock) the detector has had work waiting."""
    if not result.stored_from:
        return
    rows = sorted(result.stored_from.items())
    now = time.time()
    if conn.dialect.name == "sqlite":
        conn.exec_driver_sql(
            "UPDATE detector_state SET dirty_from_s = CASE WHEN dirty_from_s IS NULL OR "
            "dirty_from_s > ? THEN ? ELSE dirty_from_s END, "
            "pending_since_s = COALESCE(pending_since_s, ?) WHERE detector_id = ?",
            [(t, t, now, det) for det, t in rows])
    else:
        conn.exec_driver_sql(
            "UPDATE detector_state SET dirty_from_s = LEAST(COALESCE(dirty_from_s, %(t)s), %(t)s), "
            "pending_since_s = COALESCE(pending_since_s, %(now)s) "
            "WHERE detector_id = %(d)s", [{"d": det, "t": t, "now": now} for det, t in rows])


def clock_now(conn: Connection, settings: Settings) -> float:
    """The scoring clock (epoch s): wall time, or in data-clock mode the latest interval start."""
    if settings.clock == "wall":
        return time.time()
    latest = conn.execute(select(func.max(models.counts.c.start_s))).scalar()
    return float(latest) if latest is not None else 0.0


def period_clock_now(conn: Connection, settings: Settings) -> float:
    """The clock out-of-service periods open and close on: wall time, or in data-clock mode
    just after the latest interval start (the intervals already seen are before the change,
    the next ones after it)."""
    return clock_now(conn, settings) + (0.0 if settings.clock == "wall" else 1.0)


# ----------------------------------------------------------------------------- claiming


@dataclass
class Claim:
    """A detector leased for scoring, with its scoring state as read when claimed."""

    detector_id: str
    baseline_id: int
    score_from_s: int
    from_s: int | None  # earliest interval needing (re)scoring, None = just continue
    scored_through_s: int | None
    warm_state: Any  # as stored (JSON text); parsed when this detector is scored


def _scoring_step():
    """The detectors' scoring interval as SQL (``service.domain.scoring_interval_s``)."""
    d = models.detectors
    return case((d.c.interval_s < MIN_WINDOW_INTERVAL_S, literal(SHORT_INTERVAL_WINDOW_S)),
                else_=d.c.interval_s)


def claim(engine: Engine, settings: Settings, *, limit: int = 64) -> tuple[list[Claim], float]:
    """Lease up to ``limit`` detectors that need scoring."""
    s, d = models.detector_state, models.detectors
    now = time.time()

    def due_query(clock: float):
        # Never scored: due once an interval after score_from_s has ended (before that a
        # pass finds nothing to score, and the claim would come back at once, forever).
        never = and_(s.c.scored_through_s.is_(None),
                     s.c.score_from_s + _scoring_step() + settings.missing_grace_s <= clock)
        due = or_(s.c.dirty_from_s.is_not(None), s.c.claimed_from_s.is_not(None), never,
                  s.c.scored_through_s + _scoring_step() + settings.missing_grace_s <= clock)
        return (select(s.c.detector_id, s.c.baseline_id, s.c.score_from_s, s.c.dirty_from_s,
                       s.c.claimed_from_s, s.c.scored_through_s, s.c.warm_state)
                .join(d, d.c.detector_id == s.c.detector_id)
                .where(s.c.baseline_id.is_not(None),
                       or_(s.c.lease_until_s.is_(None), s.c.lease_until_s < now),
                       or_(s.c.retry_after_s.is_(None), s.c.retry_after_s <= now), due)
                .order_by(s.c.detector_id).limit(limit))

    # Look before taking the write lock: an idle scorer must not queue behind ingest.
    with read_transaction(engine) as conn:
        clock = clock_now(conn, settings)
        if conn.execute(due_query(clock).with_only_columns(s.c.detector_id)).first() is None:
            return [], clock
    with write_transaction(engine) as conn:
        clock = clock_now(conn, settings)
        q = due_query(clock)
        if not is_sqlite(engine):
            q = q.with_for_update(of=s, skip_locked=True)
        rows = conn.execute(q).all()
        if not rows:
            return [], clock
        # One statement for the batch: the rows are locked (FOR UPDATE, or SQLite's write
        # lock), so the values computed here are those just read.
        dirty, held = s.c.dirty_from_s, s.c.claimed_from_s
        conn.execute(update(s).where(s.c.detector_id.in_([r.detector_id for r in rows]))
                     .values(lease_until_s=now + settings.worker_lease_s, dirty_from_s=None,
                             claimed_from_s=case((dirty.is_(None), held),
                                                 (held.is_(None), dirty),
                                                 (dirty < held, dirty), else_=held)))
        claims = []
        for r in rows:
            starts = [v for v in (r.dirty_from_s, r.claimed_from_s) if v is not None]
            claims.append(Claim(r.detector_id, r.baseline_id, r.score_from_s,
                                min(starts) if starts else None, r.scored_through_s,
                                r.warm_state))
    return claims, clock


# ``t > ANY_TIME`` means ``t IS NOT NULL`` for any stored time, written as a range because
# SQLite's planner scans the table for IS NOT NULL but searches an index for a range.
ANY_TIME = -(2**62)


def _due_by_clock(clock: float, settings: Settings):
    """Conditions on detector_state joined to detectors: scored intervals lag the clock.

    The first term only narrows the range so that the scored_through_s index is used."""
    s = models.detector_state
    return (s.c.scored_through_s <= math.floor(clock) - settings.missing_grace_s - MIN_INTERVAL_S,
            s.c.scored_through_s + _scoring_step() + settings.missing_grace_s <= clock)


def _backlog_query(clock: float, settings: Settings):
    """Count of detectors with scoring work waiting (those waiting for a retry included).

    A sum over disjoint cases, each an index range (``+ 0`` keeps a planner off the index of
    a column that is only filtered on), so the cost follows the backlog, not the detectors."""
    s, d = models.detector_state, models.detectors
    has_baseline = s.c.baseline_id.is_not(None)
    not_dirty, not_claimed = (s.c.dirty_from_s + 0).is_(None), (s.c.claimed_from_s + 0).is_(None)
    cases = (
        select(func.count()).select_from(s).where(has_baseline, s.c.dirty_from_s > ANY_TIME),
        select(func.count()).select_from(s).where(has_baseline, s.c.claimed_from_s > ANY_TIME,
                                                  not_dirty),
        select(func.count()).select_from(s).where(has_baseline, s.c.scored_through_s.is_(None),
                                                  not_dirty, not_claimed),
        select(func.count()).select_from(s).join(d, d.c.detector_id == s.c.detector_id)
        .where(has_baseline, not_dirty, not_claimed, *_due_by_clock(clock, settings)),
    )
    total: Any = cases[0].scalar_subquery()
    for case_ in cases[1:]:
        total = total + case_.scalar_subquery()
    return select(total)


def scoring_backlog(conn: Connection, settings: Settings) -> int:
    """Detectors with scoring work waiting (those waiting for a retry included)."""
    clock = clock_now(conn, settings)
    return int(conn.execute(_backlog_query(clock, settings)).scalar_one())


FAILING_LISTED = 20  # most detectors health names


@dataclass(frozen=True)
class ScoringHealth:
    """How scoring keeps up, from index look-ups in one statement (see ``scoring_health``)."""

    status: str  # "ok" or "degraded"
    reasons: list[str]
    backlog: int
    retrying: int
    oldest_unscored_age_s: float | None
    longest_wait_s: float | None
    failing: list[dict[str, Any]]


def scoring_health(conn: Connection, settings: Settings, *, now: float | None = None
                   ) -> ScoringHealth:
    """Backlog, waits and failing detectors; degraded when a detector has failed
    ``DEGRADED_AFTER_FAILURES`` times in a row or work has waited over ``STALLED_AFTER_S``.

    ``oldest_unscored_age_s`` is measured on the scoring clock (wall, or the latest interval in
    data-clock mode): a late interval from yesterday is a day old as soon as it arrives.
    ``longest_wait_s`` is how long the oldest waiting work of a detector that is not failing
    has waited (wall seconds): work that arrived by ingest since ``pending_since_s``, a
    detector fitted but never scored since its state was last written, and in wall-clock mode
    intervals that became due without data (missing-data scoring) since they passed the grace
    period. Failing detectors are reported apart, in ``failing``."""
    s, d = models.detector_state, models.detectors
    now = time.time() if now is None else now
    clock = clock_now(conn, settings)
    has_baseline = s.c.baseline_id.is_not(None)
    by_clock = _due_by_clock(clock, settings)
    # Not failing (set and cleared with ``failures``; unindexed, so the planner keeps to the
    # time indexes instead of reading every row with failures = 0).
    not_failing = s.c.failing_since_s.is_(None)
    row = conn.execute(select(
        select(func.min(s.c.dirty_from_s)).where(has_baseline).scalar_subquery(),
        select(func.min(s.c.claimed_from_s)).where(has_baseline).scalar_subquery(),
        select(func.min(s.c.score_from_s)).where(has_baseline, s.c.scored_through_s.is_(None))
        .scalar_subquery(),
        select(func.min(s.c.scored_through_s)).join(d, d.c.detector_id == s.c.detector_id)
        .where(has_baseline, *by_clock).scalar_subquery(),
        select(func.min(s.c.scored_through_s + _scoring_step()))
        .join(d, d.c.detector_id == s.c.detector_id)
        .where(has_baseline, not_failing, *by_clock).scalar_subquery(),
        select(func.min(s.c.pending_since_s)).where(has_baseline, not_failing)
        .scalar_subquery(),
        select(func.min(s.c.updated_s)).where(has_baseline, not_failing,
                                              s.c.scored_through_s.is_(None)).scalar_subquery(),
        select(func.count()).select_from(s).where(s.c.failures >= 1).scalar_subquery(),
        select(func.count()).select_from(s).where(s.c.failures >= DEGRADED_AFTER_FAILURES)
        .scalar_subquery(),
        _backlog_query(clock, settings).scalar_subquery(),
    )).one()
    starts = [v for v in row[:4] if v is not None]
    oldest_age = max(0.0, clock - min(starts)) if starts else None
    waits = [now - float(t) for t in (row[5], row[6]) if t is not None]
    if settings.clock == "wall" and row[4] is not None:
        waits.append(clock - (float(row[4]) + settings.missing_grace_s))
    longest_wait = max(0.0, *waits) if waits else None
    retrying, stuck, backlog = int(row[7]), int(row[8]), int(row[9])
    failing = []
    if retrying:
        for r in conn.execute(select(s.c.detector_id, s.c.failures, s.c.last_error,
                                     s.c.failing_since_s, s.c.retry_after_s)
                              .where(s.c.failures >= 1)
                              .order_by(s.c.failures.desc(), s.c.detector_id)
                              .limit(FAILING_LISTED)):
            failing.append({"detector_id": r.detector_id, "failures": int(r.failures),
                            "last_error": r.last_error, "failing_since_s": r.failing_since_s,
                            "retry_after_s": r.retry_after_s})
    reasons = []
    if stuck:
        reasons.append("detectors_failing")
    if longest_wait is not None and longest_wait > STALLED_AFTER_S:
        reasons.append("backlog_stalled")
    return ScoringHealth(
        status="degraded" if reasons else "ok", reasons=reasons,
        backlog=backlog, retrying=retrying,
        oldest_unscored_age_s=None if oldest_age is None else round(oldest_age, 1),
        longest_wait_s=None if longest_wait is None else round(longest_wait, 1),
        failing=failing)


# ----------------------------------------------------------------------------- inputs


@dataclass(frozen=True)
class DetectorInfo:
    """What scoring needs to know of a detector (its registry row)."""

    detector_id: str
    label: str | None
    group: str | None
    road_class: str
    lanes: int
    interval_s: int
    timezone: str
    holiday_calendar: str | None
    capacity_per_lane_h: float | None
    # interval_s above is the scoring interval (service.domain.scoring_interval_s); this is the
    # interval the detector reports at, when it differs (None: the same)
    reported_interval_s: int | None = None


def load_infos(conn: Connection, ids: Iterable[str] | None = None) -> dict[str, DetectorInfo]:
    d = models.detectors
    q = select(d.c.detector_id, d.c.label, d.c.group_id, d.c.road_class, d.c.lanes,
               d.c.interval_s, d.c.timezone, d.c.holiday_calendar, d.c.capacity_per_lane_h)
    if ids is not None:
        q = q.where(d.c.detector_id.in_(list(ids)))
    out = {}
    for r in conn.execute(q):
        step = scoring_interval_s(r.interval_s)
        out[r.detector_id] = DetectorInfo(
            r.detector_id, r.label, r.group_id, r.road_class, r.lanes, step, r.timezone,
            r.holiday_calendar, r.capacity_per_lane_h,
            reported_interval_s=r.interval_s if r.interval_s != step else None)
    return out


def subjects_with_recent_alerts(conn: Connection, detector_ids: Sequence[str], since_s: int
                                ) -> set[str]:
    """The detectors (of ``detector_ids``) with an alert that is open or ends at or after
    ``since_s``, withdrawn ones included: only these can have alerts to reconcile when their
    rescored span has no evidence."""
    a = models.alerts
    out: set[str] = set()
    for i in range(0, len(detector_ids), 500):
        chunk = list(detector_ids[i : i + 500])
        out.update(conn.execute(select(a.c.subject).where(
            a.c.subject.in_(chunk), or_(a.c.status == "open", a.c.end_s >= since_s))
            .distinct()).scalars())
    return out


def counts_between(conn: Connection, detector_ids: Sequence[str], lo: int, hi: int | None
                   ) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Each detector's (start_s, count) arrays, in start order, for intervals starting in
    [lo, hi) (hi None: no upper end)."""
    c = models.counts
    out: dict[str, list[tuple[int, int]]] = {det: [] for det in detector_ids}
    for i in range(0, len(detector_ids), 200):
        chunk = list(detector_ids[i : i + 200])
        q = select(c.c.detector_id, c.c.start_s, c.c.count).where(
            c.c.detector_id.in_(chunk), c.c.start_s >= lo)
        if hi is not None:
            q = q.where(c.c.start_s < hi)
        for det, start, count in conn.execute(q.order_by(c.c.detector_id, c.c.start_s)):
            out[det].append((start, count))
    result = {}
    for det, rows in out.items():
        arr = np.array(rows, dtype=np.int64).reshape(-1, 2)
        result[det] = (arr[:, 0], arr[:, 1])
    return result


# ----------------------------------------------------------------------------- evidence, state


def _is_live(keep_from_s: int, end_s: int) -> bool:
    """Whether a scored result holds new intervals (else its lease is only released)."""
    return end_s > keep_from_s >= 0


def _warm_json(warm_state: Any) -> str | None:
    """The scorer's warm state as stored in ``detector_state.warm_state``."""
    if warm_state is None:
        return None
    return orjson.dumps(warm_state, option=orjson.OPT_SERIALIZE_NUMPY).decode()


def store_scored(conn: Connection, *, detector_id: str, keep_from_s: int, end_s: int,
                 rows: Sequence[dict[str, Any]], warm_state: Any, now: float) -> tuple[bool, int]:
    """Replace the detector's evidence in [keep_from_s, end_s) by ``rows``, advance its scoring
    state and release its lease. Returns (live, evidence rows removed); live is False (lease
    released only) when nothing new was scored."""
    e, s = models.evidence, models.detector_state
    values: dict[str, Any] = {"lease_until_s": None, "claimed_from_s": None, "updated_s": now}
    live = _is_live(keep_from_s, end_s)
    removed = 0
    if live:
        removed = conn.execute(delete(e).where(e.c.detector_id == detector_id,
                                               e.c.start_s >= keep_from_s,
                                               e.c.start_s < end_s)).rowcount or 0
        if rows:
            conn.execute(e.insert(), list(rows))
        values.update(scored_through_s=end_s, warm_state=_warm_json(warm_state))
    conn.execute(update(s).where(s.c.detector_id == detector_id).values(**values))
    return live, removed


@dataclass(frozen=True)
class QuietResult:
    """A detector whose rescored span has no flagged interval (``store_quiet``)."""

    detector_id: str
    keep_from_s: int
    end_s: int
    warm_state: Any


def store_quiet(conn: Connection, results: Sequence[QuietResult], *, now: float) -> set[str]:
    """``store_scored`` for many detectors without evidence rows, in a few statements: their
    evidence in [keep_from_s, end_s) is removed, their scoring state advanced and their lease
    released. Returns the detectors that had evidence removed.

    Detectors continuing in step share their span, so the evidence is looked up (and, rarely,
    deleted) once per distinct span, and the state is written with one executemany."""
    e, s = models.evidence, models.detector_state
    live = [r for r in results if _is_live(r.keep_from_s, r.end_s)]
    spans: dict[tuple[int, int], list[str]] = {}
    for r in live:
        spans.setdefault((r.keep_from_s, r.end_s), []).append(r.detector_id)
    removed: set[str] = set()
    for (lo, hi), ids in spans.items():
        for i in range(0, len(ids), 500):
            chunk = ids[i : i + 500]
            where = (e.c.detector_id.in_(chunk), e.c.start_s >= lo, e.c.start_s < hi)
            had = set(conn.execute(select(e.c.detector_id).where(*where).distinct()).scalars())
            if had:
                conn.execute(delete(e).where(*where))
                removed |= had
    if live:
        conn.execute(
            update(s).where(s.c.detector_id == bindparam("d")).values(
                lease_until_s=None, claimed_from_s=None, updated_s=now,
                scored_through_s=bindparam("through"), warm_state=bindparam("warm")),
            [{"d": r.detector_id, "through": r.end_s, "warm": _warm_json(r.warm_state)}
             for r in live])
    idle = [r.detector_id for r in results if not _is_live(r.keep_from_s, r.end_s)]
    if idle:
        conn.execute(update(s).where(s.c.detector_id.in_(idle)).values(
            lease_until_s=None, claimed_from_s=None, updated_s=now))
    return removed


def evidence_rows(conn: Connection, detector_ids: Sequence[str], lo: int, hi: int,
                  kinds: Iterable[str] | None = None) -> list[Any]:
    """Flagged intervals of the detectors in [lo, hi), by detector, kind and start."""
    e = models.evidence
    q = select(e.c.detector_id, e.c.start_s, e.c.kind, e.c.log_p, e.c.observed, e.c.expected
               ).where(e.c.detector_id.in_(list(detector_ids)), e.c.start_s >= lo,
                       e.c.start_s < hi)
    if kinds is not None:
        q = q.where(e.c.kind.in_(list(kinds)))
    return list(conn.execute(q.order_by(e.c.detector_id, e.c.kind, e.c.start_s)).all())


def neighbor_kinds(conn: Connection, others: Sequence[str], lo: int, hi: int
                    ) -> dict[str, set[str]]:
    """The kinds each of ``others`` was flagged with in [lo, hi)."""
    out: dict[str, set[str]] = {}
    if not others:
        return out
    for r in evidence_rows(conn, others, lo, hi):
        out.setdefault(r.detector_id, set()).add(r.kind)
    return out


def group_members(conn: Connection, group: str) -> list[str]:
    d = models.detectors
    return [r[0] for r in conn.execute(select(d.c.detector_id).where(d.c.group_id == group)
                                       .order_by(d.c.detector_id))]


def mark_succeeded(conn: Connection, detector_ids: Sequence[str], *, now: float) -> None:
    """Clear the failure streak; work that arrived during the pass waits from now on."""
    if not detector_ids:
        return
    s = models.detector_state
    conn.execute(update(s).where(s.c.detector_id.in_(list(detector_ids))).values(
        failures=0, last_error=None, failing_since_s=None, retry_after_s=None,
        pending_since_s=case((s.c.dirty_from_s.is_(None), None), else_=now)))


def retry_delay_s(failures: int) -> float:
    """Seconds to wait before retrying a detector after ``failures`` failures in a row."""
    return min(RETRY_MAX_S, RETRY_FIRST_S * 2.0 ** min(max(failures - 1, 0), 30))


def _short_error(exc: BaseException) -> str:
    text = f"{type(exc).__name__}: {exc}".replace("\n", " ")
    return text if len(text) <= LAST_ERROR_CHARS else text[: LAST_ERROR_CHARS - 1] + "…"


def mark_failed(conn: Connection, detector_id: str, exc: BaseException, *, now: float,
                redo_from_s: int | None = None) -> None:
    """Count a failure, keep the detector's claimed work for the retry and set its backoff.

    ``redo_from_s``: for work that was stored but whose follow-up failed, the interval to
    rescore from."""
    s = models.detector_state
    row = conn.execute(select(s.c.failures, s.c.dirty_from_s).where(
        s.c.detector_id == detector_id)).first()
    if row is None:  # the detector was deleted meanwhile
        return
    failures = int(row.failures or 0) + 1
    delay = retry_delay_s(failures)
    values: dict[str, Any] = {
        "lease_until_s": None, "failures": failures, "last_error": _short_error(exc),
        "failing_since_s": func.coalesce(s.c.failing_since_s, now),
        "retry_after_s": now + delay,
        "pending_since_s": func.coalesce(s.c.pending_since_s, now), "updated_s": now}
    if redo_from_s is not None:
        values["dirty_from_s"] = redo_from_s if row.dirty_from_s is None \
            else min(int(row.dirty_from_s), redo_from_s)
    conn.execute(update(s).where(s.c.detector_id == detector_id).values(**values))
    log.warning("scoring detector failed; retry in %.0f s", delay, exc_info=exc, extra={
        "fields": {"detector_id": detector_id, "failures": failures,
                   "error": _short_error(exc)}})


def fail_claimed(engine: Engine, detector_ids: Sequence[str], exc: Exception) -> None:
    """Record a failure on each claimed detector (which releases it for a later retry)."""
    now = time.time()
    with write_transaction(engine) as conn:
        for detector_id in detector_ids:
            mark_failed(conn, detector_id, exc, now=now)


# ----------------------------------------------------------------------------- alerts


class AlertWriter:
    """Alert inserts and updates inside the pass's write transaction, each with a new seq.

    ``changes`` counts the rows written; a caller that rolls back a SAVEPOINT restores it."""

    def __init__(self, conn: Connection, now: float) -> None:
        self.conn = conn
        self.now = now
        self.changes = 0

    def upsert(self, stored: Any | None, values: dict[str, Any]) -> int:
        """Insert, or update ``stored`` (reviving it if withdrawn) where ``values`` differ;
        the alert's id."""
        a = models.alerts
        if stored is None:
            (seq,) = next_seqs(self.conn, 1)
            self.changes += 1
            return self.conn.execute(a.insert().values(
                seq=seq, withdrawn=0, created_s=self.now, updated_s=self.now, **values)
                .returning(a.c.alert_id)).scalar_one()
        m = stored._mapping
        changed = {k: v for k, v in values.items() if not _same(m[k], v)}
        if changed or m["withdrawn"]:
            (seq,) = next_seqs(self.conn, 1)
            self.changes += 1
            self.conn.execute(update(a).where(a.c.alert_id == m["alert_id"]).values(
                seq=seq, withdrawn=0, updated_s=self.now, **changed))
        return m["alert_id"]

    def withdraw(self, stored: Any, reason: str) -> None:
        a = models.alerts
        (seq,) = next_seqs(self.conn, 1)
        self.changes += 1
        self.conn.execute(update(a).where(a.c.alert_id == stored.alert_id).values(
            seq=seq, withdrawn=1, status="closed", closed_s=stored.closed_s or stored.end_s,
            summary=reason, updated_s=self.now))


def _same(old: Any, new: Any) -> bool:
    if isinstance(old, float) or isinstance(new, float):
        if old is None or new is None:
            return old is new
        return math.isclose(old, new, rel_tol=1e-9, abs_tol=1e-9)
    return old == new


def earliest_linked_alert(conn: Connection, detector_id: str, before_s: int, *, gap_s: int
                          ) -> int | None:
    """Start of the earliest live alert of the detector starting before ``before_s`` that is
    open or ended within ``gap_s`` of it (its episode may extend into rescored data)."""
    a = models.alerts
    return conn.execute(select(func.min(a.c.start_s)).where(
        a.c.subject == detector_id, a.c.withdrawn == 0, a.c.start_s < before_s,
        or_(a.c.status == "open", a.c.end_s >= before_s - gap_s))).scalar()


def alerts_from(conn: Connection, subject: str, lo: int, *, kind: str | None = None
                ) -> list[Any]:
    """Every alert row of the subject starting at ``lo`` or later, withdrawn ones too."""
    a = models.alerts
    q = select(a).where(a.c.subject == subject, a.c.start_s >= lo)
    if kind is not None:
        q = q.where(a.c.kind == kind)
    return list(conn.execute(q).all())


def earliest_alert_ending_after(conn: Connection, subject: str, after_s: int) -> int | None:
    """Start of the earliest live alert of the subject that ends at ``after_s`` or later."""
    a = models.alerts
    return conn.execute(select(func.min(a.c.start_s)).where(
        a.c.subject == subject, a.c.withdrawn == 0, a.c.end_s >= after_s)).scalar()


def group_detector_alerts(conn: Connection, group: str, lo: int, hi: int) -> list[Any]:
    """Live alerts of the group's detectors ending at ``lo`` or later and starting before ``hi``."""
    a = models.alerts
    return list(conn.execute(select(a).where(
        a.c.group_id == group, a.c.detector_id.is_not(None), a.c.withdrawn == 0,
        a.c.end_s >= lo, a.c.start_s < hi)).all())


# Tables rewritten row by row on every scoring pass (detector_state) or read by the scoring
# and health plans with joins (detectors): vacuumed, their statistics refreshed. The alert
# list's statistics too (analyze only: it grows for years, and rows are rarely rewritten).
HOT_TABLES = ("detector_state", "detectors")
ANALYZED_TABLES = ("alerts",)


def vacuum_hot_tables(engine: Engine) -> list[str]:
    """PostgreSQL: ``VACUUM (ANALYZE)`` the scoring state and the registry and ``ANALYZE``
    the alerts; the tables done.

    Autovacuum (on by default) does this too, but a scoring pass updates every scored
    detector's state row, so with autovacuum off or behind the table fills with dead rows and
    the planner's statistics go stale. Measured with 10,500 detectors and 131,000 alerts on
    a server with autovacuum off: ``GET /v1/health``'s scoring figures took 148 ms, 6 ms after
    this step; a caught-up alert poll 19 ms, 2 ms after it. Milliseconds for tables of this
    size; nothing on SQLite."""
    if engine.dialect.name != "postgresql":
        return []
    done: list[str] = []
    with engine.connect() as conn:
        conn = conn.execution_options(isolation_level="AUTOCOMMIT")
        for table in (*HOT_TABLES, *ANALYZED_TABLES):
            command = "VACUUM (ANALYZE)" if table in HOT_TABLES else "ANALYZE"
            try:
                conn.exec_driver_sql(f"{command} {table}")
            except DBAPIError as exc:  # a lock or statement timeout: the next pass does it
                log.warning("table upkeep skipped", extra={"fields": {
                    "table": table, "error": type(exc.orig).__name__}})
                continue
            done.append(table)
    return done
