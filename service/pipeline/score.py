"""The scoring loop: claim detectors with work, score them, write evidence and alerts.

The statistics are in ``service.stats`` (pure numpy: ``timeline`` for the tests, ``episodes``
for grouping flagged intervals into alerts); the SQL in ``service.store.scoring``. This module
decides *what* to score and keeps alerts a pure function of the stored counts and the baseline:

- Ingest lowers ``detector_state.dirty_from_s`` in the transaction that stores counts
  (``service.store.scoring.mark_dirty``).
- A scorer (the worker loop of ``service.pipeline.worker``: a thread of ``tallyward serve``
  in the inline set-up, or ``tallyward worker`` / ``tallyward score`` processes) claims dirty
  detectors with a lease (``FOR UPDATE SKIP LOCKED`` on PostgreSQL), scores outside any write
  transaction, and writes the results in one short transaction that first takes the
  alert-sequence row lock (see ``service.store.scoring`` for why).
- Evidence is computed in UTC-day blocks, each started afresh ``WARMUP_S`` before the block.
  Scoring a day in one call or interval by interval therefore gives the same flags, and a late
  interval is handled by rescoring from its block on: any arrival order gives the same alerts.
- Flagged intervals are stored sparsely in ``evidence``; alert episodes are rebuilt from them
  and reconciled with stored alerts (``service.pipeline.reconcile``). A change gets a new
  ``seq``.
- One detector's failure never stops the others: each detector is scored on its own and
  written inside its own SAVEPOINT, except that detectors with nothing flagged and no alert
  within reach (most of a pass) are written together in one; should that batch fail, its
  detectors are written one by one. A failure is logged, counted on the detector's
  ``detector_state`` row and retried with exponential backoff (``retry_after_s``, in the
  database so every scorer process agrees); ``GET /v1/health`` names detectors that keep
  failing. A failure of a whole pass is retried detector by detector, so a failure that only
  shows in a batch is still pinned on the detector that causes it.

What a scorer remembers between passes (parsed baselines, thresholds, zone offsets) is a
``ScoringCache`` owned by the scorer: a worker loop keeps one for its life, a ``score_pass`` or
``score_until_idle`` call without one uses a fresh one for that call.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import os
import socket
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import orjson
from sqlalchemy import Connection, Engine
from sqlalchemy.exc import DBAPIError

from service.config import Settings
from service.domain import KINDS
from service.pipeline.reconcile import reconcile_detector, refresh_group
from service.stats import baseline as bl
from service.stats.baseline_thresholds import thresholds_for_baseline
from service.stats.calendar import local_time_grid
from service.stats.capacity import capacity_cap
from service.stats.episodes import NO_REPORTS_REOPEN_S
from service.stats.thresholds import Thresholds
from service.stats.timeline import WarmState, score_timeline
from service.stats.windows import complete_window_end, window_sums
from service.store import scoring as store
from service.store.baselines import BaselineCache, save_thresholds
from service.store.detectors import detector_count, return_due
from service.store.engine import read_transaction, write_transaction
from service.store.scoring import Claim, DetectorInfo, mark_dirty
from service.timefmt import LocalOffsets

__all__ = [  # mark_dirty is the ingest hook (``after_store``) that feeds this loop
    "BLOCK_S", "WARMUP_S", "DetectorInfo", "Scored", "ScoringCache", "align_down",
    "detector_budget", "evaluate_piece", "mark_dirty", "plan_segments", "score_claims", "score_pass",
    "score_until_idle", "thresholds_for", "write_scored",
]

log = logging.getLogger("tallyward.scoring")

BLOCK_S = 86_400  # scoring restarts afresh at each UTC-day block
WARMUP_S = 6 * 3600  # seconds scored before a block to warm the tests' state
Piece = tuple[int, int, int, Any]  # run_from, keep_from, end (epoch s), warm state
Failure = tuple[str, Exception, int | None]  # detector, error, interval to rescore from


class ScoringCache:
    """What a scorer remembers between passes: parsed baselines and their thresholds (by
    baseline id, see ``BaselineCache``) and zone offsets.

    Lifetime: that of its owner (a worker loop, or one ``score_pass`` / ``score_until_idle``
    call); it must not outlive the database it was filled from."""

    def __init__(self) -> None:
        self.baselines = BaselineCache()
        self.offsets = LocalOffsets()


def align_down(t: int, interval_s: int, tz: str, offsets: LocalOffsets) -> int:
    """The start of the detector's interval (local grid) containing ``t``."""
    return t - (t + offsets.offset(tz, t)) % interval_s


def detector_budget(settings: Settings, n_detectors: int) -> float:
    """Each detector's weekly false-alert budget.

    Without a network cap, ``false_alerts_per_week``. With ``network_false_alerts_per_day``
    = C, at most ``7 C / N`` for N detectors (Bonferroni across detectors: the expected false
    alerts of the network add up to at most C a day whatever N is). N is rounded up to a
    power of two so thresholds are derived again only when the network doubles."""
    budget = settings.false_alerts_per_week
    cap = settings.network_false_alerts_per_day
    if cap is None or n_detectors <= 0:
        return budget
    bucket = 1 << max(0, math.ceil(math.log2(n_detectors)))
    return min(budget, 7.0 * cap / bucket)


def thresholds_for(base: bl.Baseline, info: DetectorInfo, settings: Settings
                   ) -> Thresholds:
    """Every test's threshold for this detector and baseline, from the false-alert budget
    (about a second of CPU, so callers cache the result)."""
    return thresholds_for_baseline(base, interval_s=info.interval_s,
                                   false_alerts_per_week=settings.false_alerts_per_week)


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
                  clock: float, grace_s: int, offsets: LocalOffsets) -> list[Piece]:
    """(run_from, keep_from, end, warm_state) pieces that rescore what this claim needs.

    Each UTC-day block is scored from ``WARMUP_S`` before it with a fresh state, unless the
    claim simply continues where the last pass stopped inside the same block."""
    step, tz = info.interval_s, info.timezone
    start = _rescore_start(claim, info, offsets)
    end = align_down(int(clock) - grace_s - step, step, tz, offsets) + step
    if latest_present_s is not None:
        end = max(end, latest_present_s + step)
    if end <= start:
        return []
    pieces: list[Piece] = []
    t = start
    while t < end:
        seg_end = min(end, t - t % BLOCK_S + BLOCK_S)
        run_from, warm = _piece_start(claim, info, t, first=t == start, offsets=offsets)
        pieces.append((run_from, t, seg_end, warm))
        t = seg_end
    return pieces


def _rescore_start(claim: Claim, info: DetectorInfo, offsets: LocalOffsets) -> int:
    """The first interval the claim (re)scores."""
    step, tz = info.interval_s, info.timezone
    score_from = align_down(claim.score_from_s + step - 1, step, tz, offsets)
    cont = claim.scored_through_s if claim.scored_through_s is not None else score_from
    if claim.from_s is None:
        return cont
    return min(cont, max(align_down(claim.from_s, step, tz, offsets), score_from))


def _piece_start(claim: Claim, info: DetectorInfo, t: int, *, first: bool,
                 offsets: LocalOffsets) -> tuple[int, Any]:
    """Where the piece kept from ``t`` starts scoring, and its warm state: the claim's state
    when it simply continues where the last pass stopped inside the same block, else a fresh
    state ``WARMUP_S`` before the block."""
    step, tz = info.interval_s, info.timezone
    block = t - t % BLOCK_S
    through = claim.scored_through_s
    if first and through is not None and t == through and claim.warm_state is not None \
            and (through - 1) // BLOCK_S * BLOCK_S == block and through % BLOCK_S != 0:
        return t, claim.warm_state
    score_from = align_down(claim.score_from_s + step - 1, step, tz, offsets)
    return max(score_from, align_down(block - WARMUP_S, step, tz, offsets)), None


def read_from_s(claim: Claim, info: DetectorInfo, offsets: LocalOffsets) -> int:
    """The earliest interval any piece of the claim reads, whatever its end: the counts a
    pass needs for the claim start here."""
    return _piece_start(claim, info, _rescore_start(claim, info, offsets), first=True,
                        offsets=offsets)[0]


def score_claims(conn: Connection, claims: Sequence[Claim], clock: float, settings: Settings,
                 cache: ScoringCache) -> tuple[list[Scored], list[tuple[str, Exception]]]:
    """Compute evidence for each claim (read-only: runs outside any write transaction).

    Returns the scored detectors and, apart, the detectors whose scoring raised (with the
    exception): one detector's bad data or baseline never costs the others their pass. A
    database error is raised instead, as it may have spoiled the transaction for every claim."""
    infos = store.load_infos(conn, [c.detector_id for c in claims])
    if settings.network_false_alerts_per_day is not None:
        budget = detector_budget(settings, detector_count(conn))
        settings = settings.model_copy(update={"false_alerts_per_week": budget})
    plans: list[tuple[Claim, DetectorInfo, list[Piece]]] = []
    failed: list[tuple[str, Exception]] = []
    # One read of counts for the pass, from the earliest interval any claim reads and with
    # no upper end: the detectors' latest intervals (data past the clock's end extends what
    # is scored) come from the same rows. An interval before a claim's read start cannot
    # extend its span (the span starts after it).
    ready: list[tuple[Claim, DetectorInfo, int]] = []
    for claim in claims:
        info = infos.get(claim.detector_id)
        if info is None:
            continue
        try:
            if isinstance(claim.warm_state, str):
                claim = dataclasses.replace(claim, warm_state=orjson.loads(claim.warm_state))
            ready.append((claim, info, read_from_s(claim, info, cache.offsets)))
        except Exception as exc:  # noqa: BLE001 - this detector fails alone; recorded
            failed.append((claim.detector_id, exc))
    lo = min((r[2] for r in ready), default=None)
    data = store.counts_between(conn, [r[0].detector_id for r in ready], lo, None) \
        if lo is not None else {}
    for claim, info, _ in ready:
        starts = data.get(claim.detector_id, (np.empty(0, np.int64),))[0]
        latest = int(starts.max()) if starts.size else None
        try:
            plans.append(_plan(claim, info, latest, clock, settings, cache))
        except Exception as exc:  # noqa: BLE001 - this detector fails alone; recorded
            failed.append((claim.detector_id, exc))
    out: list[Scored] = []
    for claim, info, pieces in plans:
        try:
            out.append(_score_one(conn, claim, info, pieces, data, settings, cache))
        except DBAPIError:
            raise
        except Exception as exc:  # noqa: BLE001 - this detector fails alone; recorded
            failed.append((claim.detector_id, exc))
    return out, failed


def _plan(claim: Claim, info: DetectorInfo, latest: int | None, clock: float,
          settings: Settings, cache: ScoringCache) -> tuple[Claim, DetectorInfo, list[Piece]]:
    """The claim and the pieces to score (``latest``: the detector's latest stored interval
    start, or None)."""
    if latest is not None and info.reported_interval_s is not None:
        # Short intervals are scored on window sums: the last complete window's start.
        latest = complete_window_end(latest, interval_s=info.reported_interval_s,
                                     window_s=info.interval_s) - info.interval_s
    pieces = plan_segments(claim, info, latest_present_s=latest, clock=clock,
                           grace_s=settings.missing_grace_s, offsets=cache.offsets)
    return claim, info, pieces


def _model(conn: Connection, claim: Claim, info: DetectorInfo, settings: Settings,
           cache: ScoringCache) -> tuple[bl.Baseline, Thresholds, bool]:
    """The claim's baseline and thresholds; True when the thresholds were derived just now
    (they are then stored with the pass's results)."""
    base = cache.baselines.baseline(conn, claim.baseline_id)
    thresholds = cache.baselines.thresholds(conn, claim.baseline_id,
                                            settings.false_alerts_per_week)
    if thresholds is not None:
        return base, thresholds, False
    # Not cached here: the pass stores them with its results, and the next pass reads them
    # back. Cached before that write, a rolled-back write would leave them stored nowhere.
    return base, thresholds_for(base, info, settings), True


def _score_one(conn: Connection, claim: Claim, info: DetectorInfo, pieces: list[Piece],
               data: dict[str, tuple[np.ndarray, np.ndarray]], settings: Settings,
               cache: ScoringCache) -> Scored:
    if not pieces:
        return Scored(info, claim.baseline_id, -1, -1, warm_state=claim.warm_state)
    base, thresholds, derived = _model(conn, claim, info, settings, cache)
    starts, counts = data.get(info.detector_id, (np.empty(0, np.int64), np.empty(0, np.int64)))
    if info.reported_interval_s is not None:
        # Short intervals (service.stats.windows): judged on window sums, as fitted.
        starts, counts = window_sums(starts, counts, interval_s=info.reported_interval_s,
                                     window_s=info.interval_s)
    scored = Scored(info, claim.baseline_id, pieces[0][1], pieces[-1][2],
                    new_thresholds=thresholds if derived else None)
    for run_from, keep_from, end, warm in pieces:
        grid, values, present = _piece_arrays(starts, counts, run_from, end, info.interval_s)
        flags, log_p, mu, state = evaluate_piece(info, base, grid, values, present, warm,
                                                 thresholds)
        scored.rows.extend(_evidence_rows(info.detector_id, grid, grid >= keep_from, flags,
                                          log_p, mu, values, present))
        scored.warm_state = state
    return scored


def _piece_arrays(starts: np.ndarray, counts: np.ndarray, run_from: int, end: int,
                  interval_s: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The piece's interval grid, the counts on it (0 where missing) and which are present."""
    grid = np.arange(run_from, end, interval_s, dtype=np.int64)
    pos = np.searchsorted(grid, starts)
    inside = (pos < grid.size) & (starts >= run_from) & (starts < end)
    inside &= grid[np.minimum(pos, grid.size - 1)] == starts
    present = np.zeros(grid.size, bool)
    values = np.zeros(grid.size, np.int64)
    present[pos[inside]] = True
    values[pos[inside]] = counts[inside]
    return grid, values, present


def _evidence_rows(detector_id: str, grid: np.ndarray, keep: np.ndarray,
                   flags: dict[str, np.ndarray], log_p: dict[str, np.ndarray], mu: np.ndarray,
                   values: np.ndarray, present: np.ndarray) -> list[dict[str, Any]]:
    """Evidence rows of the kept flagged intervals, kind by kind."""
    rows = []
    for kind in KINDS:
        for i in np.flatnonzero(flags[kind] & keep):
            rows.append({
                "detector_id": detector_id, "start_s": int(grid[i]), "kind": kind,
                "log_p": float(max(log_p[kind][i], -1e6)),
                "observed": float(values[i]) if present[i] else None,
                "expected": float(mu[i])})
    return rows


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


# ----------------------------------------------------------------------------- writing


# Groups whose detectors' alerts changed: the span rebuilt and the members concerned.
Touched = dict[str, tuple[tuple[int, int], list[Scored]]]


def write_scored(engine: Engine, scored: Sequence[Scored], settings: Settings, *,
                 failed: Sequence[tuple[str, Exception]] = ()) -> int:
    """Store evidence, rebuild episodes, reconcile alerts and causes: one short transaction.

    Each detector's writes, and each group's refresh, run inside their own SAVEPOINT: one that
    fails is rolled back alone and recorded (with ``failed``, the detectors whose scoring
    already failed) for a retry with backoff, while the rest commit. Returns the number of
    alert rows written."""
    now = time.time()
    close_after = settings.close_after_intervals
    with write_transaction(engine) as conn:
        store.next_seqs(conn, 0)  # take the sequence row lock first: alert writers queue here
        writer = store.AlertWriter(conn, now)
        failures: list[Failure] = [(d, exc, None) for d, exc in failed]
        succeeded, touched = _write_detectors(conn, writer, scored, failures, now=now,
                                              close_after=close_after)
        _refresh_groups(conn, writer, touched, succeeded, failures, close_after=close_after)
        store.mark_succeeded(conn, list(succeeded), now=now)
        for detector_id, exc, redo_from_s in failures:
            store.mark_failed(conn, detector_id, exc, now=now, redo_from_s=redo_from_s)
    _log_batch(scored, succeeded, failures, writer.changes)
    return writer.changes


def scorer_id() -> str:
    """Who scored a batch, in the logs: host and process id (several workers share a host)."""
    return f"{socket.gethostname()}:{os.getpid()}"


def _log_batch(scored: Sequence[Scored], succeeded: dict[str, None], failures: list[Failure],
               changes: int) -> None:
    """One DEBUG line per committed batch: the scorer, and for each detector written the span
    of intervals it scored (``[keep_from_s, end_s)``, epoch s; rescored spans included), so
    the logs of several workers show who scored what."""
    if not log.isEnabledFor(logging.DEBUG):
        return
    spans = {sc.info.detector_id: [sc.keep_from_s, sc.end_s] for sc in scored
             if sc.info.detector_id in succeeded and sc.end_s > sc.keep_from_s >= 0}
    log.debug("scored batch", extra={"fields": {
        "scorer": scorer_id(),
        "detectors": len({sc.info.detector_id for sc in scored} | {f[0] for f in failures}),
        "spans": spans, "failed": sorted({f[0] for f in failures}), "alert_changes": changes}})


def _write_detectors(conn: Connection, writer: store.AlertWriter, scored: Sequence[Scored],
                     failures: list[Failure], *, now: float,
                     close_after: int) -> tuple[dict[str, None], Touched]:
    """Each detector's results in its own SAVEPOINT; the detectors written (in order) and the
    groups to refresh. A detector that fails is added to ``failures``."""
    succeeded: dict[str, None] = {}
    touched: Touched = {}
    alerted = _alerted(conn, scored, close_after=close_after)
    # Most detectors in a pass have nothing flagged and no alert within reach: their state is
    # written together (one SAVEPOINT), the others one by one. Should the quiet batch fail,
    # its detectors are written one by one too, so the failure lands on its detector.
    quiet = [sc for sc in scored if sc.new_thresholds is None and not sc.rows
             and sc.info.detector_id not in alerted]
    if len(quiet) > 1:
        try:
            with conn.begin_nested():
                removed = store.store_quiet(conn, [
                    store.QuietResult(sc.info.detector_id, sc.keep_from_s, sc.end_s,
                                      sc.warm_state) for sc in quiet], now=now)
        except Exception:  # noqa: BLE001 - written one by one below, failures pinned there
            log.warning("writing a batch of quiet detectors failed; writing them one by one",
                        exc_info=True)
        else:
            for sc in quiet:
                succeeded[sc.info.detector_id] = None
                if sc.info.detector_id in removed:
                    _touch(touched, sc, (sc.keep_from_s, sc.end_s))
            scored = [sc for sc in scored if sc.info.detector_id not in succeeded]
    for sc in scored:
        changes = writer.changes
        try:
            with conn.begin_nested():
                span = _write_detector(conn, writer, sc, now=now, close_after=close_after,
                                       alerted=sc.info.detector_id in alerted)
        except Exception as exc:  # noqa: BLE001 - this detector fails alone; recorded
            writer.changes = changes
            failures.append((sc.info.detector_id, exc, None))
            continue
        succeeded[sc.info.detector_id] = None
        if span is not None:
            _touch(touched, sc, span)
    return succeeded, touched


def _touch(touched: Touched, sc: Scored, span: tuple[int, int]) -> None:
    """Note that the detector's group needs a refresh over ``span``."""
    group = sc.info.group
    if group is None:
        return
    old = touched.get(group)
    if old is None:
        touched[group] = (span, [sc])
    else:
        (lo, hi), members = old
        touched[group] = ((min(span[0], lo), max(span[1], hi)), [*members, sc])


def _refresh_groups(conn: Connection, writer: store.AlertWriter, touched: Touched,
                    succeeded: dict[str, None], failures: list[Failure],
                    *, close_after: int) -> None:
    """Each touched group's refresh in its own SAVEPOINT. A group that fails leaves its
    members' own alerts standing and marks the members for rescoring from their new work."""
    for group, ((lo, hi), members) in sorted(touched.items()):
        changes = writer.changes
        try:
            with conn.begin_nested():
                refresh_group(conn, writer, group, lo, hi, close_after=close_after)
        except Exception as exc:  # noqa: BLE001 - this group fails alone; recorded
            writer.changes = changes
            for sc in members:
                succeeded.pop(sc.info.detector_id, None)
                failures.append((sc.info.detector_id, exc, sc.keep_from_s))


def _alerted(conn: Connection, scored: Sequence[Scored], *, close_after: int) -> set[str]:
    """The pass's detectors that may have alerts to reconcile (one query for the pass): an
    alert open, or ending within the linking gap before the earliest rescored interval."""
    live = [sc for sc in scored if sc.end_s > sc.keep_from_s >= 0]
    if not live:
        return set()
    gap = max(max(close_after + 1, NO_REPORTS_REOPEN_S // sc.info.interval_s + 1)
              * sc.info.interval_s for sc in live)
    return store.subjects_with_recent_alerts(conn, [sc.info.detector_id for sc in live],
                                             min(sc.keep_from_s for sc in live) - gap)


def _write_detector(conn: Connection, writer: store.AlertWriter, sc: Scored, *, now: float,
                    close_after: int, alerted: bool = True) -> tuple[int, int] | None:
    """One detector's evidence, scoring state and alerts; the span its alerts were rebuilt
    over, or None when there was nothing new to score.

    A quiet detector (no evidence in the rescored span and no alert that could reach into
    it, ``alerted`` False) has nothing to reconcile: its episodes would be empty and no stored
    alert could change. Its group is refreshed only when evidence was removed."""
    if sc.new_thresholds is not None:
        save_thresholds(conn, sc.baseline_id, sc.new_thresholds)
    live, removed = store.store_scored(conn, detector_id=sc.info.detector_id,
                                       keep_from_s=sc.keep_from_s, end_s=sc.end_s, rows=sc.rows,
                                       warm_state=sc.warm_state, now=now)
    if not live:
        return None
    if not alerted and not sc.rows:
        return (sc.keep_from_s, sc.end_s) if removed else None
    return reconcile_detector(conn, writer, sc.info, baseline_id=sc.baseline_id,
                              keep_from_s=sc.keep_from_s, end_s=sc.end_s,
                              close_after=close_after)


# ----------------------------------------------------------------------------- passes


def score_pass(engine: Engine, settings: Settings, *, limit: int = 64,
               cache: ScoringCache | None = None) -> int:
    """Claim, score and write one batch of detectors; returns how many were claimed.

    A detector that fails is recorded and retried later with backoff; the others' results are
    written. Should the batch fail as a whole, its detectors are retried one at a time, so the
    failure lands on the detector that causes it. Raises only when even a failure cannot be
    recorded (the database is unreachable): the leases then expire and the work is retried.
    Without a ``cache`` the pass starts with an empty one."""
    cache = cache if cache is not None else ScoringCache()
    # Out-of-service periods that have reached their ``until`` end before this pass writes
    # alerts, so none is suppressed after its detector is back in service.
    return_due(engine)
    claims, clock = store.claim(engine, settings, limit=limit)
    if not claims:
        return 0
    try:
        _score_and_write(engine, claims, clock, settings, cache)
    except Exception as exc:  # noqa: BLE001 - pinned on detectors below
        if len(claims) == 1:
            store.fail_claimed(engine, [claims[0].detector_id], exc)
            return len(claims)
        log.warning("scoring pass failed; retrying its detectors one at a time", exc_info=exc,
                    extra={"fields": {"detectors": len(claims)}})
        for one in claims:
            try:
                _score_and_write(engine, [one], clock, settings, cache)
            except Exception as exc_one:  # noqa: BLE001 - recorded on this detector
                store.fail_claimed(engine, [one.detector_id], exc_one)
    return len(claims)


def _score_and_write(engine: Engine, claims: Sequence[Claim], clock: float,
                     settings: Settings, cache: ScoringCache) -> None:
    with read_transaction(engine) as conn:
        scored, failed = score_claims(conn, claims, clock, settings, cache)
    write_scored(engine, scored, settings, failed=failed)


def score_until_idle(engine: Engine, settings: Settings, *, limit: int = 64,
                     max_passes: int = 100_000, cache: ScoringCache | None = None) -> int:
    """Score passes until none claims work; the number of detector passes. Without a
    ``cache`` the call keeps one of its own for its passes."""
    cache = cache if cache is not None else ScoringCache()
    total = 0
    for _ in range(max_passes):
        n = score_pass(engine, settings, limit=limit, cache=cache)
        if n == 0:
            break
        total += n
    return total

