"""Scoring at the database edge: evidence for new intervals, alert episodes, causes, seq.

The statistics are in ``service.stats.timeline`` (pure numpy). This module decides *what* to score
and keeps alerts a pure function of the stored counts and the baseline:

- Ingest lowers ``detector_state.dirty_from_s`` in the transaction that stores counts.
- A scorer (a thread in each API worker, or ``tallyward score``) claims dirty detectors with a
  lease (``FOR UPDATE SKIP LOCKED`` on PostgreSQL), scores outside any write transaction, and
  writes the results in one short transaction that first takes the alert-sequence row lock.
- Evidence is computed in UTC-day blocks, each started afresh ``WARMUP_S`` before the block.
  Scoring a day in one call or interval by interval therefore gives the same flags, and a late
  interval is handled by rescoring from its block on: any arrival order gives the same alerts.
- Flagged intervals are stored sparsely in ``evidence``; alert episodes are rebuilt from them
  and reconciled with stored alerts by (subject, kind, start). A change gets a new ``seq``.
  That key is unique over *all* stored alerts, withdrawn ones included, and the lookup reads
  withdrawn ones too: when later data supports a withdrawn alert again, the same row comes
  back (same ``id``, ``withdrawn`` false, a new ``seq`` so pollers see it), never a second row.
- One detector's failure never stops the others: each detector is scored on its own and
  written inside its own SAVEPOINT. A failure is logged, counted on the detector's
  ``detector_state`` row and retried with exponential backoff (``retry_after_s``, in the
  database so every scorer process agrees); ``GET /v1/health`` names detectors that keep
  failing. A failure of a whole pass is retried detector by detector, so a failure that only
  shows in a batch is still pinned on the detector that causes it.

Why the sequence row lock: a poller asking for ``seq > N`` must never miss a change. If two
transactions drew sequence numbers freely, the larger could commit first and a poller could
pass the smaller one before it became visible. Holding the counter row from drawing a number
until commit makes commit order equal ``seq`` order.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import threading
import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import orjson
from sqlalchemy import Connection, Engine, case, delete, func, or_, select, update
from sqlalchemy.exc import DBAPIError

from service.config import Settings
from service.stats import baseline as bl
from service.stats.calendar import local_time_grid
from service.stats.capacity import capacity_cap
from service.stats.thresholds import Thresholds, calibrate
from service.stats.timeline import WarmState, score_timeline
from service.store import tables as models
from service.store.engine import is_sqlite, read_transaction, write_transaction
from service.timefmt import LocalOffsets

log = logging.getLogger("tallyward.scoring")

KINDS = ("no_counts", "low_volume", "high_volume", "over_capacity", "repeated_value", "no_data")
LOW_KINDS = frozenset({"no_counts", "low_volume"})
BLOCK_S = 86_400
WARMUP_S = 6 * 3600
LEASE_S = 120.0
# Retry a detector whose scoring failed after RETRY_FIRST_S, doubling per consecutive failure up
# to RETRY_MAX_S. Module constants until they move to Settings.
RETRY_FIRST_S = 5.0  # seconds
RETRY_MAX_S = 900.0  # seconds
LAST_ERROR_CHARS = 300  # the detector_state.last_error column width
# Health calls scoring degraded when a detector failed this many times in a row, or when work
# has waited longer than STALLED_AFTER_S (wall seconds) without being scored.
DEGRADED_AFTER_FAILURES = 3
STALLED_AFTER_S = 600.0
NO_DATA_REOPEN_S = 2 * 3600  # gaps closer than this are one intermittent-reporting episode


# ----------------------------------------------------------------------------- sequence


def next_seqs(conn: Connection, n: int) -> list[int]:
    """Draw ``n`` alert sequence numbers; the counter row stays locked until commit."""
    c = models.counters
    top = conn.execute(update(c).where(c.c.name == "alert_seq").values(value=c.c.value + n)
                       .returning(c.c.value)).scalar_one()
    return list(range(top - n + 1, top + 1))


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


# ----------------------------------------------------------------------------- time helpers


_OFFSETS = LocalOffsets()


def align_down(t: int, interval_s: int, tz: str) -> int:
    """The start of the detector's interval (local grid) containing ``t``."""
    return t - (t + _OFFSETS.offset(tz, t)) % interval_s


def clock_now(conn: Connection, settings: Settings) -> float:
    if settings.clock == "wall":
        return time.time()
    latest = conn.execute(select(func.max(models.counts.c.start_s))).scalar()
    return float(latest) if latest is not None else 0.0


# ----------------------------------------------------------------------------- claiming


@dataclass
class Claim:
    detector_id: str
    baseline_id: int
    score_from_s: int
    from_s: int | None  # earliest interval needing (re)scoring, None = just continue
    scored_through_s: int | None
    warm_state: Any  # as stored (JSON text); parsed when this detector is scored


def claim(engine: Engine, settings: Settings, *, limit: int = 64) -> tuple[list[Claim], float]:
    """Lease up to ``limit`` detectors that need scoring."""
    s, d = models.detector_state, models.detectors
    now = time.time()

    def due_query(clock: float):  # type: ignore[no-untyped-def]
        due = or_(s.c.dirty_from_s.is_not(None), s.c.claimed_from_s.is_not(None),
                  s.c.scored_through_s.is_(None),
                  s.c.scored_through_s + d.c.interval_s + settings.missing_grace_s <= clock)
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
        claims = []
        for r in rows:
            starts = [v for v in (r.dirty_from_s, r.claimed_from_s) if v is not None]
            from_s = min(starts) if starts else None
            conn.execute(update(s).where(s.c.detector_id == r.detector_id).values(
                lease_until_s=now + LEASE_S, claimed_from_s=from_s, dirty_from_s=None))
            claims.append(Claim(r.detector_id, r.baseline_id, r.score_from_s, from_s,
                                r.scored_through_s, r.warm_state))
    return claims, clock


MIN_INTERVAL_S = 60  # the detectors table's smallest allowed interval_s
# ``t > ANY_TIME`` means ``t IS NOT NULL`` for any stored time, written as a range because
# SQLite's planner scans the table for IS NOT NULL but searches an index for a range.
ANY_TIME = -(2**62)


def _due_by_clock(clock: float, settings: Settings):  # type: ignore[no-untyped-def]
    """Conditions on detector_state joined to detectors: scored intervals lag the clock.

    The first term only narrows the range so that the scored_through_s index is used."""
    s, d = models.detector_state, models.detectors
    return (s.c.scored_through_s <= math.floor(clock) - settings.missing_grace_s - MIN_INTERVAL_S,
            s.c.scored_through_s + d.c.interval_s + settings.missing_grace_s <= clock)


def _backlog_query(clock: float, settings: Settings):  # type: ignore[no-untyped-def]
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
    total = cases[0].scalar_subquery()
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
        select(func.min(s.c.scored_through_s + d.c.interval_s))
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
    detector_id: str
    label: str | None
    group: str | None
    road_class: str
    lanes: int
    interval_s: int
    timezone: str
    holiday_calendar: str | None
    capacity_per_lane_h: float | None


def load_infos(conn: Connection, ids: Iterable[str] | None = None) -> dict[str, DetectorInfo]:
    d = models.detectors
    q = select(d.c.detector_id, d.c.label, d.c.group_id, d.c.road_class, d.c.lanes,
               d.c.interval_s, d.c.timezone, d.c.holiday_calendar, d.c.capacity_per_lane_h)
    if ids is not None:
        q = q.where(d.c.detector_id.in_(list(ids)))
    return {r.detector_id: DetectorInfo(*r) for r in conn.execute(q)}


_BASELINES: dict[int, bl.Baseline] = {}
_BASELINES_LOCK = threading.Lock()


def load_baseline(conn: Connection, baseline_id: int) -> bl.Baseline:
    with _BASELINES_LOCK:
        cached = _BASELINES.get(baseline_id)
    if cached is not None:
        return cached
    b = models.baselines
    model = conn.execute(select(b.c.model).where(b.c.baseline_id == baseline_id)).scalar_one()
    base = bl.Baseline.from_dict(orjson.loads(model))
    with _BASELINES_LOCK:
        if len(_BASELINES) > 20_000:
            _BASELINES.clear()
        _BASELINES[baseline_id] = base
    return base


def _counts_between(conn: Connection, detector_ids: Sequence[str], lo: int, hi: int
                    ) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    c = models.counts
    out: dict[str, list[tuple[int, int]]] = {det: [] for det in detector_ids}
    for i in range(0, len(detector_ids), 200):
        chunk = list(detector_ids[i : i + 200])
        for det, start, count in conn.execute(
                select(c.c.detector_id, c.c.start_s, c.c.count)
                .where(c.c.detector_id.in_(chunk), c.c.start_s >= lo, c.c.start_s < hi)):
            out[det].append((start, count))
    result = {}
    for det, rows in out.items():
        arr = np.array(rows, dtype=np.int64).reshape(-1, 2)
        result[det] = (arr[:, 0], arr[:, 1])
    return result


# ----------------------------------------------------------------------------- evaluation


@dataclass
class Scored:
    info: DetectorInfo
    baseline_id: int
    keep_from_s: int
    end_s: int
    rows: list[dict[str, Any]] = field(default_factory=list)
    warm_state: Any = None
    new_thresholds: Thresholds | None = None


def plan_segments(claim: Claim, info: DetectorInfo, *, latest_present_s: int | None,
                  clock: float, grace_s: int) -> list[tuple[int, int, int, Any]]:
    """(run_from, keep_from, end, warm_state) pieces that rescore what this claim needs.

    Each UTC-day block is scored from ``WARMUP_S`` before it with a fresh state, unless the
    claim simply continues where the last pass stopped inside the same block."""
    step = info.interval_s
    score_from = align_down(claim.score_from_s + step - 1, step, info.timezone)
    cont = claim.scored_through_s if claim.scored_through_s is not None else score_from
    start = cont
    if claim.from_s is not None:
        start = min(cont, max(align_down(claim.from_s, step, info.timezone), score_from))
    settled_end = align_down(int(clock) - grace_s - step, step, info.timezone) + step
    end = settled_end
    if latest_present_s is not None:
        end = max(end, latest_present_s + step)
    if end <= start:
        return []
    continuing = (claim.scored_through_s is not None and start == claim.scored_through_s
                  and claim.warm_state is not None)
    pieces = []
    t = start
    while t < end:
        block = t - t % BLOCK_S
        seg_end = min(end, block + BLOCK_S)
        if t == start and continuing and (claim.scored_through_s - 1) // BLOCK_S * BLOCK_S == block \
                and claim.scored_through_s % BLOCK_S != 0:
            pieces.append((t, t, seg_end, claim.warm_state))
        else:
            run_from = max(score_from, align_down(block - WARMUP_S, step, info.timezone))
            pieces.append((run_from, t, seg_end, None))
        t = seg_end
    return pieces


def score_claims(conn: Connection, claims: Sequence[Claim], clock: float, settings: Settings
                 ) -> tuple[list[Scored], list[tuple[str, Exception]]]:
    """Compute evidence for each claim (read-only: runs outside any write transaction).

    Returns the scored detectors and, apart, the detectors whose scoring raised (with the
    exception): one detector's bad data or baseline never costs the others their pass. A
    database error is raised instead, as it may have spoiled the transaction for every claim."""
    infos = load_infos(conn, [c.detector_id for c in claims])
    plans: list[tuple[Claim, DetectorInfo, list[tuple[int, int, int, Any]]]] = []
    failed: list[tuple[str, Exception]] = []
    c = models.counts
    for claim in claims:
        info = infos.get(claim.detector_id)
        if info is None:
            continue
        try:
            if isinstance(claim.warm_state, str):
                claim = dataclasses.replace(claim, warm_state=orjson.loads(claim.warm_state))
            latest = conn.execute(select(func.max(c.c.start_s)).where(
                c.c.detector_id == claim.detector_id)).scalar()
            pieces = plan_segments(claim, info, latest_present_s=latest, clock=clock,
                                   grace_s=settings.missing_grace_s)
        except DBAPIError:
            raise
        except Exception as exc:  # noqa: BLE001 - this detector fails alone; recorded
            failed.append((claim.detector_id, exc))
            continue
        plans.append((claim, info, pieces))
    lo = min((p[0] for _, _, pieces in plans for p in pieces), default=None)
    hi = max((p[2] for _, _, pieces in plans for p in pieces), default=None)
    data = _counts_between(conn, [cl.detector_id for cl, _, p in plans if p], lo, hi) \
        if lo is not None and hi is not None else {}
    out: list[Scored] = []
    for claim, info, pieces in plans:
        try:
            out.append(_score_one(conn, claim, info, pieces, data, settings))
        except DBAPIError:
            raise
        except Exception as exc:  # noqa: BLE001 - this detector fails alone; recorded
            failed.append((claim.detector_id, exc))
    return out, failed


def _score_one(conn: Connection, claim: Claim, info: DetectorInfo,
               pieces: list[tuple[int, int, int, Any]],
               data: dict[str, tuple[np.ndarray, np.ndarray]], settings: Settings) -> Scored:
    if not pieces:
        return Scored(info, claim.baseline_id, -1, -1, warm_state=claim.warm_state)
    base = load_baseline(conn, claim.baseline_id)
    thresholds = cached_thresholds(conn, claim.baseline_id, settings.false_alerts_per_week)
    new_thresholds = None
    if thresholds is None:
        thresholds = new_thresholds = thresholds_for(base, info, settings)
        remember_thresholds(claim.baseline_id, thresholds)
    starts, counts = data.get(info.detector_id, (np.empty(0, np.int64), np.empty(0, np.int64)))
    scored = Scored(info, claim.baseline_id, pieces[0][1], pieces[-1][2],
                    new_thresholds=new_thresholds)
    for run_from, keep_from, end, warm in pieces:
        grid = np.arange(run_from, end, info.interval_s, dtype=np.int64)
        pos = np.searchsorted(grid, starts)
        inside = (pos < grid.size) & (starts >= run_from) & (starts < end)
        inside &= grid[np.minimum(pos, grid.size - 1)] == starts
        present = np.zeros(grid.size, bool)
        values = np.zeros(grid.size, np.int64)
        present[pos[inside]] = True
        values[pos[inside]] = counts[inside]
        flags, log_p, mu, state = evaluate_piece(info, base, grid, values, present, warm,
                                                 thresholds)
        keep = grid >= keep_from
        for kind in KINDS:
            hit = np.flatnonzero(flags[kind] & keep)
            for i in hit:
                scored.rows.append({
                    "detector_id": info.detector_id, "start_s": int(grid[i]), "kind": kind,
                    "log_p": float(max(log_p[kind][i], -1e6)),
                    "observed": float(values[i]) if present[i] else None,
                    "expected": float(mu[i])})
        scored.warm_state = state
    return scored


def evaluate_piece(info: DetectorInfo, base: bl.Baseline, grid: np.ndarray, values: np.ndarray,
                   present: np.ndarray, warm: Any, thresholds: Thresholds
                   ) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray], np.ndarray, Any]:
    """Flags and log p-values per kind for one stretch of consecutive intervals."""
    step = info.interval_s
    tg = local_time_grid(grid, interval_s=step, timezone=info.timezone,
                            holiday_calendar=info.holiday_calendar)
    mu, log_se, day_alpha, interval_alpha = base.expected_for(tg.day_type, tg.bin)
    cap = capacity_cap(info.road_class, lanes=info.lanes, interval_s=step,
                               per_lane_hourly=info.capacity_per_lane_h)
    state = WarmState.from_dict(warm) if warm is not None else None
    ev = score_timeline(int(grid[0]), values, present, mu, log_se, day_alpha,
                                interval_alpha, interval_s=step, cap=cap,
                                thresholds=thresholds, warm_state=state, local_day=tg.local_day)
    flags = {k: np.asarray(ev.flag[k], bool) for k in KINDS}
    log_p = {k: np.asarray(ev.log_p[k], float) for k in KINDS}
    return flags, log_p, np.asarray(mu, float), ev.warm_state.to_dict()


_THRESHOLDS: dict[tuple[int, float], Thresholds] = {}


def clear_caches() -> None:
    """Forget every cached baseline and threshold (a process that meets a database whose
    baseline ids were reused: tests that empty the database between cases)."""
    with _BASELINES_LOCK:
        _BASELINES.clear()
    _THRESHOLDS.clear()


def thresholds_to_json(th: Thresholds) -> str:
    return orjson.dumps(dataclasses.asdict(th)).decode()


def thresholds_from_json(text: str) -> Thresholds:
    return Thresholds(**orjson.loads(text))


def cached_thresholds(conn: Connection, baseline_id: int, budget: float
                      ) -> Thresholds | None:
    """Thresholds computed before for this baseline and budget (memory, then database)."""
    hit = _THRESHOLDS.get((baseline_id, budget))
    if hit is not None:
        return hit
    text = conn.execute(select(models.baselines.c.thresholds).where(
        models.baselines.c.baseline_id == baseline_id)).scalar()
    if text:
        th = thresholds_from_json(text)
        if math.isclose(th.false_alerts_per_week, budget):
            _THRESHOLDS[(baseline_id, budget)] = th
            return th
    return None


def remember_thresholds(baseline_id: int, th: Thresholds) -> None:
    if len(_THRESHOLDS) > 20_000:
        _THRESHOLDS.clear()
    _THRESHOLDS[(baseline_id, th.false_alerts_per_week)] = th


def thresholds_for(base: bl.Baseline, info: DetectorInfo, settings: Settings
                   ) -> Thresholds:
    """Every test's threshold for this detector and baseline, from the false-alert budget
    (Markov-chain CUSUM limits: about a second of CPU, so callers cache the result)."""
    week = []
    for code in (0, 0, 0, 0, 0, 1, 2):  # five weekdays, a Saturday, a Sunday
        bins = np.arange(base.bins_per_day)
        week.append(base.expected_for(np.full(bins.size, code), bins))
    mu_week, log_se, day_alpha, interval_alpha = (np.concatenate([w[i] for w in week])
                                                  for i in range(4))
    # Share of scheduled intervals that went unreported on the days the fit used.
    own_days = [p.days_used for name, p in base.profiles.items() if p.fitted_from == name]
    scheduled = max(1, (sum(own_days) or max(p.days_used for p in base.profiles.values()))
                    * base.bins_per_day)
    missing_rate = float(np.clip(1.0 - (base.intervals_used + base.intervals_trimmed)
                                 / scheduled, 0.002, 0.5))
    thresholds = calibrate(
        settings.false_alerts_per_week, interval_s=info.interval_s, mu_week=mu_week,
        interval_alpha=interval_alpha, day_alpha=day_alpha, log_se=log_se,
        missing_rate=missing_rate)
    return thresholds


# ----------------------------------------------------------------------------- episodes


@dataclass
class Episode:
    subject: str
    detector_id: str | None
    kind: str
    start_s: int
    end_s: int  # start of the last anomalous interval
    closed_s: int | None
    n_intervals: int
    observed: float | None
    expected: float
    log_p: float

    @property
    def status(self) -> str:
        return "open" if self.closed_s is None else "closed"


def episodes_from_rows(detector_id: str, rows: Sequence[Any], *, interval_s: int,
                       scored_end_s: int, close_after: int) -> list[Episode]:
    """Group flagged intervals (sorted by kind, start) into episodes.

    An episode closes after ``close_after`` scored intervals without its flag; shorter gaps do
    not split it. Missing data closes as soon as data returns, but a new gap within
    ``NO_DATA_REOPEN_S`` (or ``close_after`` intervals, if longer) reopens the same episode:
    intermittent reporting is one alert, not one per gap."""
    episodes: list[Episode] = []
    by_kind: dict[str, list[Any]] = {}
    for r in rows:
        by_kind.setdefault(r.kind, []).append(r)
    for kind, items in by_kind.items():
        items.sort(key=lambda r: r.start_s)
        closing = 1 if kind == "no_data" else close_after
        split = max(close_after, NO_DATA_REOPEN_S // interval_s) if kind == "no_data" \
            else close_after
        current: list[Any] = []

        def finish(part: list[Any], *, kind: str = kind, closing: int = closing) -> None:
            last = part[-1].start_s
            closes_at = last + interval_s * (closing + 1)
            observed = None if kind == "no_data" else float(sum(p.observed or 0 for p in part))
            episodes.append(Episode(
                subject=detector_id, detector_id=detector_id, kind=kind,
                start_s=part[0].start_s, end_s=last,
                closed_s=closes_at - interval_s if closes_at <= scored_end_s else None,
                n_intervals=len(part), observed=observed,
                expected=float(sum(p.expected or 0 for p in part)),
                log_p=float(min(p.log_p for p in part))))

        for r in items:
            if current and (r.start_s - current[-1].start_s) // interval_s - 1 >= split:
                finish(current)
                current = []
            current.append(r)
        if current:
            finish(current)
    return episodes


# ----------------------------------------------------------------------------- causes, text


def cause_for(kind: str, *, others: Sequence[str], neighbour_kinds: dict[str, set[str]]) -> str:
    """Likely cause of an episode from what the detector's group neighbours show meanwhile.

    ``traffic``: at least one neighbour deviates the same way at the same time (several
    detectors of one group together point to traffic). ``detector``: the neighbours look
    normal. ``communications``: missing data, or values frozen on several detectors at once
    (a stuck controller or polling fault). ``unknown``: no neighbours to compare."""
    if kind == "no_data":
        return "communications"
    if not others:
        return "unknown"
    if kind == "repeated_value":  # frozen together: the controller or its polling, not a loop
        together = any("repeated_value" in neighbour_kinds.get(o, set()) for o in others)
        return "communications" if together else "detector"
    if kind == "over_capacity":
        return "detector"
    same = LOW_KINDS if kind in LOW_KINDS else frozenset({"high_volume", "over_capacity"})
    if any(neighbour_kinds.get(o, set()) & same for o in others):
        return "traffic"
    return "detector"


def _duration(seconds: int) -> str:
    minutes = max(1, round(seconds / 60))
    if minutes < 60:
        return f"{minutes} min"
    hours, rest = divmod(minutes, 60)
    if hours < 48:
        return f"{hours} h {rest:02d} min" if rest else f"{hours} h"
    return f"{hours / 24:.1f} days"


def _local(t: int, tz: str, fmt: str) -> str:
    return datetime.fromtimestamp(t, ZoneInfo(tz)).strftime(fmt)


def summary_sentence(ep: Episode, cause: str, *, interval_s: int, timezone: str,
                     label: str | None = None, group: str | None = None,
                     members: Sequence[str] = ()) -> str:
    """One sentence a person can read on a phone."""
    span_end = ep.end_s + interval_s
    when = (f"{_local(ep.start_s, timezone, '%a %H:%M')}–{_local(span_end, timezone, '%H:%M')}"
            if span_end - ep.start_s < 86_400 else
            f"from {_local(ep.start_s, timezone, '%a %m-%d %H:%M')}")
    length = _duration(span_end - ep.start_s)
    where = label or ep.detector_id or f"group {group}"
    expected = ep.expected
    tail = {
        "detector": "likely a detector fault",
        "traffic": f"neighbours in {group} deviate too — likely a traffic event",
        "communications": "likely a communications loss",
        "unknown": "cause unknown (no neighbours to compare)",
    }[cause]
    if ep.kind == "no_data":
        if ep.detector_id is None:
            return (f"No reports from {len(members)} detectors of {group} for {length} ({when} "
                    f"local) — likely a controller or communications loss.")
        if ep.n_intervals * interval_s < span_end - ep.start_s:
            return (f"{where}: intermittent reporting, {ep.n_intervals} intervals missing over "
                    f"{length} ({when} local) — {tail}.")
        return f"{where}: no reports for {length} ({when} local) — {tail}."
    observed = ep.observed or 0.0
    if ep.kind == "no_counts":
        what = "dead loop or card" if cause == "detector" else "closure or blockage"
        return (f"{where}: counted 0 vehicles for {length} ({when} local) where about "
                f"{expected:,.0f} were expected — {tail} ({what}).")
    if ep.kind == "low_volume":
        share = observed / expected if expected else 0.0
        return (f"{where}: counted {observed:,.0f} vehicles in {length} ({when} local), "
                f"{share:.0%} of the {expected:,.0f} expected — {tail}.")
    if ep.kind == "high_volume":
        ratio = observed / expected if expected else float("inf")
        what = " (chattering or double counting)" if cause == "detector" else ""
        return (f"{where}: counted {observed:,.0f} vehicles in {length} ({when} local), "
                f"{ratio:.1f}× the {expected:,.0f} expected — {tail}{what}.")
    if ep.kind == "over_capacity":
        return (f"{where}: counted {observed:,.0f} vehicles in {length} ({when} local), more than "
                f"its lanes can carry — physically implausible, likely double counting.")
    return (f"{where}: the same count repeated {ep.n_intervals} times ({when} local) — likely "
            f"a frozen controller or stuck detector.")


# ----------------------------------------------------------------------------- writing


_ALERT_FIELDS = ("kind", "cause", "status", "start_s", "end_s", "closed_s", "observed",
                 "expected", "log_p", "n_intervals", "detectors", "baseline_id", "summary",
                 "part_of", "group_id")


class _Writer:
    """Alert inserts and updates inside the pass's write transaction, each with a new seq."""

    def __init__(self, conn: Connection, now: float) -> None:
        self.conn = conn
        self.now = now
        self.changes = 0

    def upsert(self, stored: Any | None, values: dict[str, Any]) -> int:
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


def _evidence_rows(conn: Connection, detector_ids: Sequence[str], lo: int, hi: int,
                   kinds: Iterable[str] | None = None) -> list[Any]:
    e = models.evidence
    q = select(e.c.detector_id, e.c.start_s, e.c.kind, e.c.log_p, e.c.observed, e.c.expected
               ).where(e.c.detector_id.in_(list(detector_ids)), e.c.start_s >= lo,
                       e.c.start_s < hi)
    if kinds is not None:
        q = q.where(e.c.kind.in_(list(kinds)))
    return conn.execute(q.order_by(e.c.detector_id, e.c.kind, e.c.start_s)).all()


def _group_members(conn: Connection, group: str) -> list[str]:
    d = models.detectors
    return [r[0] for r in conn.execute(select(d.c.detector_id).where(d.c.group_id == group)
                                       .order_by(d.c.detector_id))]


def _neighbour_kinds(conn: Connection, others: Sequence[str], lo: int, hi: int
                     ) -> dict[str, set[str]]:
    out: dict[str, set[str]] = {}
    if not others:
        return out
    for r in _evidence_rows(conn, others, lo, hi):
        out.setdefault(r.detector_id, set()).add(r.kind)
    return out


def _communications_runs(conn: Connection, members: Sequence[str], lo: int, hi: int,
                         step: int) -> list[tuple[int, int, list[str], float, float]]:
    """Stretches where most of a group's detectors are flagged missing together:
    (start, last start, members, expected, strongest log p)."""
    need = max(2, math.ceil(len(members) / 2))
    at: dict[int, dict[str, Any]] = {}
    for r in _evidence_rows(conn, members, lo, hi, kinds=("no_data",)):
        at.setdefault(r.start_s, {})[r.detector_id] = r
    runs: list[tuple[int, int, list[str], float, float]] = []
    current: list[int] = []
    for t in sorted(at):
        if len(at[t]) < need:
            continue
        if current and t - current[-1] > step:
            runs.append(_run(current, at))
            current = []
        current.append(t)
    if current:
        runs.append(_run(current, at))
    return runs


def _run(times: list[int], at: dict[int, dict[str, Any]]) -> tuple[int, int, list[str], float, float]:
    dets = sorted({d for t in times for d in at[t]})
    expected = float(sum(r.expected or 0 for t in times for r in at[t].values()))
    log_p = float(min(r.log_p for t in times for r in at[t].values()))
    return times[0], times[-1], dets, expected, log_p


def write_scored(engine: Engine, scored: Sequence[Scored], settings: Settings, *,
                 failed: Sequence[tuple[str, Exception]] = ()) -> int:
    """Store evidence, rebuild episodes, reconcile alerts and causes: one short transaction.

    Each detector's writes, and each group's refresh, run inside their own SAVEPOINT: one that
    fails is rolled back alone and recorded (with ``failed``, the detectors whose scoring
    already failed) for a retry with backoff, while the rest commit."""
    now = time.time()
    close_after = settings.close_after_intervals
    with write_transaction(engine) as conn:
        next_seqs(conn, 0)  # take the sequence row lock first: alert writers queue here
        writer = _Writer(conn, now)
        touched: dict[str, tuple[int, int]] = {}
        members: dict[str, list[Scored]] = {}
        succeeded: dict[str, None] = {}
        failures: list[tuple[str, Exception, int | None]] = [(d, exc, None) for d, exc in failed]
        for sc in scored:
            changes = writer.changes
            try:
                with conn.begin_nested():
                    span = _write_detector(conn, writer, sc, now=now, close_after=close_after)
            except Exception as exc:  # noqa: BLE001 - this detector fails alone; recorded
                writer.changes = changes
                failures.append((sc.info.detector_id, exc, None))
                continue
            succeeded[sc.info.detector_id] = None
            group = sc.info.group
            if span is not None and group is not None:
                old = touched.get(group)
                touched[group] = (min(span[0], old[0]), max(span[1], old[1])) if old else span
                members.setdefault(group, []).append(sc)
        for group, (lo, hi) in sorted(touched.items()):
            changes = writer.changes
            try:
                with conn.begin_nested():
                    _refresh_group(conn, writer, group, lo, hi, close_after=close_after)
            except Exception as exc:  # noqa: BLE001 - this group fails alone; recorded
                writer.changes = changes
                # Its members' own alerts stand; rescoring them later refreshes the group.
                for sc in members[group]:
                    succeeded.pop(sc.info.detector_id, None)
                    failures.append((sc.info.detector_id, exc, sc.keep_from_s))
        _mark_succeeded(conn, list(succeeded), now=now)
        for detector_id, exc, redo_from_s in failures:
            _mark_failed(conn, detector_id, exc, now=now, redo_from_s=redo_from_s)
        return writer.changes


def _write_detector(conn: Connection, writer: _Writer, sc: Scored, *, now: float,
                    close_after: int) -> tuple[int, int] | None:
    """One detector's evidence, scoring state and alerts; the span its alerts were rebuilt
    over, or None when there was nothing new to score."""
    e, s = models.evidence, models.detector_state
    if sc.new_thresholds is not None:
        conn.execute(update(models.baselines).where(
            models.baselines.c.baseline_id == sc.baseline_id).values(
            thresholds=thresholds_to_json(sc.new_thresholds)))
    values: dict[str, Any] = {"lease_until_s": None, "claimed_from_s": None, "updated_s": now}
    live = sc.end_s > sc.keep_from_s >= 0
    if live:
        conn.execute(delete(e).where(e.c.detector_id == sc.info.detector_id,
                                     e.c.start_s >= sc.keep_from_s, e.c.start_s < sc.end_s))
        if sc.rows:
            conn.execute(e.insert(), sc.rows)
        values.update(scored_through_s=sc.end_s,
                      warm_state=orjson.dumps(sc.warm_state,
                                              option=orjson.OPT_SERIALIZE_NUMPY).decode()
                      if sc.warm_state is not None else None)
    conn.execute(update(s).where(s.c.detector_id == sc.info.detector_id).values(**values))
    if not live:
        return None
    return _reconcile_detector(conn, writer, sc, close_after=close_after)


def _mark_succeeded(conn: Connection, detector_ids: Sequence[str], *, now: float) -> None:
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


def _mark_failed(conn: Connection, detector_id: str, exc: BaseException, *, now: float,
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


def _reconcile_detector(conn: Connection, writer: _Writer, sc: Scored, *, close_after: int
                        ) -> tuple[int, int]:
    a = models.alerts
    info = sc.info
    step = info.interval_s
    gap = max(close_after + 1, NO_DATA_REOPEN_S // step + 1) * step
    lo = sc.keep_from_s
    while True:
        earlier = conn.execute(select(func.min(a.c.start_s)).where(
            a.c.subject == info.detector_id, a.c.withdrawn == 0, a.c.start_s < lo,
            or_(a.c.status == "open", a.c.end_s >= lo - gap))).scalar()
        if earlier is None:
            break
        lo = int(earlier)
    rows = _evidence_rows(conn, [info.detector_id], lo, sc.end_s)
    episodes = episodes_from_rows(info.detector_id, rows, interval_s=step,
                                  scored_end_s=sc.end_s, close_after=close_after)
    # Withdrawn alerts too: (subject, kind, start) is unique over all rows, so an episode that
    # later data supports again revives its withdrawn row instead of inserting a second one.
    stored = {(r.kind, r.start_s): r for r in conn.execute(select(a).where(
        a.c.subject == info.detector_id, a.c.start_s >= lo))}
    for ep in episodes:
        key = (ep.kind, ep.start_s)
        writer.upsert(stored.pop(key, None), _episode_values(ep, info, sc.baseline_id, "unknown"))
    for old in stored.values():
        if not old.withdrawn:
            writer.withdraw(old, "Withdrawn: later data no longer supports this alert.")
    return lo, sc.end_s


def _episode_values(ep: Episode, info: DetectorInfo, baseline_id: int, cause: str
                    ) -> dict[str, Any]:
    return {
        "subject": ep.subject, "detector_id": ep.detector_id, "group_id": info.group,
        "kind": ep.kind, "cause": cause, "status": ep.status, "start_s": ep.start_s,
        "end_s": ep.end_s, "closed_s": ep.closed_s, "observed": ep.observed,
        "expected": ep.expected, "log_p": ep.log_p, "n_intervals": ep.n_intervals,
        "baseline_id": baseline_id, "detectors": None, "part_of": None,
        "summary": summary_sentence(ep, cause, interval_s=info.interval_s,
                                    timezone=info.timezone, label=info.label, group=info.group),
    }


def _refresh_group(conn: Connection, writer: _Writer, group: str, lo: int, hi: int, *,
                   close_after: int) -> None:
    """Causes of the group's alerts near [lo, hi), and its communications alerts."""
    a = models.alerts
    members = _group_members(conn, group)
    infos = load_infos(conn, members)
    step = min(i.interval_s for i in infos.values())
    pad = (close_after + 2) * step
    subject = f"group:{group}"
    earlier = conn.execute(select(func.min(a.c.start_s)).where(
        a.c.subject == subject, a.c.withdrawn == 0, a.c.end_s >= lo - pad)).scalar()
    lo = min(lo, int(earlier)) if earlier is not None else lo
    runs = _communications_runs(conn, members, lo - pad, hi, step)
    stored_groups = {r.start_s: r for r in conn.execute(select(a).where(  # withdrawn too
        a.c.subject == subject, a.c.kind == "no_data", a.c.start_s >= lo - pad))}
    group_ids: list[tuple[int, int, int]] = []
    for start, last, dets, expected, log_p in runs:
        ep = Episode(subject=subject, detector_id=None, kind="no_data", start_s=start,
                     end_s=last, closed_s=last + step if last + step < hi else None,
                     n_intervals=(last - start) // step + 1, observed=None, expected=expected,
                     log_p=log_p)
        values = {
            "subject": subject, "detector_id": None, "group_id": group, "kind": "no_data",
            "cause": "communications", "status": ep.status, "start_s": start, "end_s": last,
            "closed_s": ep.closed_s, "observed": None, "expected": expected, "log_p": log_p,
            "n_intervals": ep.n_intervals, "baseline_id": None,
            "detectors": orjson.dumps(dets).decode(), "part_of": None,
            "summary": summary_sentence(ep, "communications", interval_s=step,
                                        timezone=next(iter(infos.values())).timezone,
                                        group=group, members=dets),
        }
        alert_id = writer.upsert(stored_groups.pop(start, None), values)
        group_ids.append((start, last, alert_id))
    for old in stored_groups.values():
        if not old.withdrawn:
            writer.withdraw(old, "Withdrawn: later data shows the group was not offline together.")
    detector_alerts = conn.execute(select(a).where(
        a.c.group_id == group, a.c.detector_id.is_not(None), a.c.withdrawn == 0,
        a.c.end_s >= lo - pad, a.c.start_s < hi + pad)).all()
    for row in detector_alerts:
        info = infos[row.detector_id]
        others = [m for m in members if m != row.detector_id]
        window_lo, window_hi = row.start_s - 2 * info.interval_s, row.end_s + 3 * info.interval_s
        cause = cause_for(row.kind, others=others,
                          neighbour_kinds=_neighbour_kinds(conn, others, window_lo, window_hi))
        part_of = None
        if row.kind == "no_data":
            for start, last, alert_id in group_ids:
                if row.start_s <= last and row.end_s >= start:
                    part_of = alert_id
                    break
        ep = Episode(subject=row.subject, detector_id=row.detector_id, kind=row.kind,
                     start_s=row.start_s, end_s=row.end_s, closed_s=row.closed_s,
                     n_intervals=row.n_intervals, observed=row.observed,
                     expected=row.expected or 0.0, log_p=row.log_p or 0.0)
        summary = summary_sentence(ep, cause, interval_s=info.interval_s, timezone=info.timezone,
                                   label=info.label, group=group)
        if cause != row.cause or summary != row.summary or part_of != row.part_of:
            writer.upsert(row, {"cause": cause, "summary": summary, "part_of": part_of})


# ----------------------------------------------------------------------------- passes


def score_pass(engine: Engine, settings: Settings, *, limit: int = 64) -> int:
    """Claim, score and write one batch of detectors; returns how many were claimed.

    A detector that fails is recorded and retried later with backoff; the others' results are
    written. Should the batch fail as a whole, its detectors are retried one at a time, so the
    failure lands on the detector that causes it. Raises only when even a failure cannot be
    recorded (the database is unreachable): the leases then expire and the work is retried."""
    claims, clock = claim(engine, settings, limit=limit)
    if not claims:
        return 0
    try:
        _score_and_write(engine, claims, clock, settings)
    except Exception as exc:  # noqa: BLE001 - pinned on detectors below
        if len(claims) == 1:
            _fail_claims(engine, claims, exc)
            return len(claims)
        log.warning("scoring pass failed; retrying its detectors one at a time", exc_info=exc,
                    extra={"fields": {"detectors": len(claims)}})
        for one in claims:
            try:
                _score_and_write(engine, [one], clock, settings)
            except Exception as exc_one:  # noqa: BLE001 - recorded on this detector
                _fail_claims(engine, [one], exc_one)
    return len(claims)


def _score_and_write(engine: Engine, claims: Sequence[Claim], clock: float,
                     settings: Settings) -> None:
    with read_transaction(engine) as conn:
        scored, failed = score_claims(conn, claims, clock, settings)
    write_scored(engine, scored, settings, failed=failed)


def _fail_claims(engine: Engine, claims: Sequence[Claim], exc: Exception) -> None:
    """Record a failure on each claimed detector (which releases it for a later retry)."""
    now = time.time()
    with write_transaction(engine) as conn:
        for c in claims:
            _mark_failed(conn, c.detector_id, exc, now=now)


def score_until_idle(engine: Engine, settings: Settings, *, limit: int = 64,
                     max_passes: int = 100_000) -> int:
    total = 0
    for _ in range(max_passes):
        n = score_pass(engine, settings, limit=limit)
        if n == 0:
            break
        total += n
    return total


class Scorer:
    """A background thread that scores as counts arrive (one per API worker process)."""

    def __init__(self, engine: Engine, settings: Settings, *, idle_s: float = 1.0) -> None:
        self.engine = engine
        self.settings = settings
        self.idle_s = idle_s
        self.wake = threading.Event()
        self.stop_event = threading.Event()
        self.thread = threading.Thread(target=self._run, name="tallyward-scorer", daemon=True)

    def start(self) -> Scorer:
        self.thread.start()
        return self

    def stop(self) -> None:
        self.stop_event.set()
        self.wake.set()
        self.thread.join(30)

    def _run(self) -> None:
        while not self.stop_event.is_set():
            try:
                n = score_pass(self.engine, self.settings)
            except Exception:  # noqa: BLE001 - keep scoring other detectors; logged
                log.exception("scoring pass failed")
                n = 0
                self.stop_event.wait(self.idle_s)
            if n == 0:
                self.wake.wait(self.idle_s)
                self.wake.clear()
