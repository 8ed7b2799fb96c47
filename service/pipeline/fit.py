"""Baseline fits at the database edge: read history, call ``baseline.fit_baseline``, store.

The statistics live in ``service.stats.baseline`` (pure numpy). This module loads each detector's
counts in the fit window, leaves out intervals inside alerts already raised, stores the
versioned result, and points the detector's scoring state at it. The detectors of one group
are fitted together and their dispersion is pooled across the group before anything is stored
(``fit_together``). ``fit_many`` spreads the work over processes, a group within one; each
process opens its own database connection.
"""

from __future__ import annotations

import dataclasses
import itertools
import time
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlalchemy import Connection, Engine, select

from service.config import Settings
from service.domain import scoring_interval_s
from service.stats import baseline as bl
from service.stats.baseline_thresholds import thresholds_for_baseline
from service.stats.windows import window_sums
from service.store import tables as models
from service.store.baselines import (
    current_baselines,
    insert_baseline,
    point_scoring_at,
    thresholds_to_json,
)
from service.store.engine import make_worker_engine, read_transaction, write_transaction
from service.store.scoring import group_members

DAY_S = 86_400


# The fit's read of one detector's history; {mark} is the driver's placeholder. The range on
# start_s lets PostgreSQL read only the partitions of the fit window.
HISTORY_SQL = ("SELECT start_s, count FROM counts WHERE detector_id = {mark} AND "
               "start_s >= {mark} AND start_s < {mark} ORDER BY start_s")


def _load_history(conn: Connection, detector_id: str, lo: int, hi: int
                  ) -> tuple[np.ndarray, np.ndarray]:
    mark = "?" if conn.dialect.name == "sqlite" else "%s"  # the driver's own placeholder
    # The raw driver cursor: SQLAlchemy Row objects cost ~20x more per value here.
    cur = conn.connection.driver_connection.cursor()  # type: ignore[union-attr]
    try:
        cur.execute(HISTORY_SQL.format(mark=mark), (detector_id, lo, hi))
        flat = np.fromiter(itertools.chain.from_iterable(cur.fetchall()), dtype=np.int64)
    finally:
        cur.close()
    pairs = flat.reshape(-1, 2)
    return pairs[:, 0].copy(), pairs[:, 1].copy()


def _excluded(conn: Connection, detector_id: str, start_s: np.ndarray, lo: int, hi: int
              ) -> np.ndarray:
    """Intervals inside alerts already raised on this detector (left out of the fit)."""
    a = models.alerts
    rows = conn.execute(select(a.c.start_s, a.c.end_s).where(
        a.c.detector_id == detector_id, a.c.withdrawn == 0, a.c.end_s >= lo,
        a.c.start_s < hi)).all()
    mask = np.zeros(start_s.shape, bool)
    for r in rows:
        mask |= (start_s >= r.start_s) & (start_s <= r.end_s)
    return mask


def summarize(result: bl.FitResult) -> dict[str, Any]:
    base = result.baseline
    assert base is not None
    per_type = {}
    for name, prof in base.profiles.items():
        per_type[name] = {
            "fitted_from": prof.fitted_from,
            "distribution": prof.distribution,
            "day_alpha": round(float(prof.day_alpha), 6),
            "interval_alpha": round(float(prof.interval_alpha), 6),
            "dispersion_p_value": float(prof.dispersion_p_value),
            "days_used": int(prof.days_used),
            "expected_daily_volume": round(float(np.sum(prof.expected)), 1),
        }
    return {"day_types": per_type, "intervals_used": int(base.intervals_used),
            "intervals_trimmed": int(base.intervals_trimmed), "days_dropped": int(base.days_dropped)}


def fit_one(engine: Engine, detector_id: str, *, as_of_s: int, settings: Settings,
            thresholds: bool = True) -> dict[str, Any]:
    """Fit one detector and store the baseline; with ``thresholds``, also derive its scoring
    thresholds from the false-alert budget (otherwise the first scoring pass does). Its
    dispersion is pooled with its group mates' current baselines (``fit_together``)."""
    return fit_together(engine, [detector_id], as_of_s=as_of_s, settings=settings,
                        thresholds=thresholds)[0]


@dataclass
class _Fitted:
    """One detector's fit, not stored yet."""

    out: dict[str, Any]
    group: str | None
    step: int
    result: bl.FitResult | None
    started: float


def fit_together(engine: Engine, detector_ids: Sequence[str], *, as_of_s: int,
                 settings: Settings, thresholds: bool = True) -> list[dict[str, Any]]:
    """Fit detectors, pool the dispersion of each group's across the group
    (``baseline.pool_group_dispersion``), and store each baseline (with its thresholds when
    ``thresholds``). Results in the order given. A group's detectors not fitted here take part
    with their current baselines' own values (``baseline.own_dispersion``), so a detector
    refitted alone is pooled as it was when the whole network was fitted."""
    fitted = [_fit_detector(engine, det, as_of_s=as_of_s, settings=settings)
              for det in detector_ids]
    by_group: dict[tuple[str, int], list[_Fitted]] = {}
    for f in fitted:
        if f.group is not None and f.result is not None and f.result.baseline is not None:
            by_group.setdefault((f.group, f.step), []).append(f)
    for (group, step), members in by_group.items():
        here = {f.out["detector_id"] for f in members}
        with read_transaction(engine) as conn:
            others = [d for d in group_members(conn, group) if d not in here]
            mates = [bl.own_dispersion(b) for b in current_baselines(conn, others).values()
                     if b.interval_s == step]
        own = [f.result.baseline for f in members
               if f.result is not None and f.result.baseline is not None]
        pooled = bl.pool_group_dispersion(own + mates)[: len(own)]
        for f, base in zip(members, pooled, strict=True):
            assert f.result is not None
            f.result = dataclasses.replace(f.result, baseline=base)
    return [_store_fit(engine, f, as_of_s=as_of_s, settings=settings, thresholds=thresholds)
            for f in fitted]


def _fit_detector(engine: Engine, detector_id: str, *, as_of_s: int, settings: Settings
                  ) -> _Fitted:
    started = time.perf_counter()
    lo = as_of_s - settings.fit_window_days * DAY_S
    with read_transaction(engine) as conn:
        det = conn.execute(select(models.detectors).where(
            models.detectors.c.detector_id == detector_id)).first()
        if det is None:
            return _Fitted({"detector_id": detector_id, "status": "failed",
                            "reason": "unknown detector"}, None, 0, None, started)
        start_s, counts = _load_history(conn, detector_id, lo, as_of_s)
        step = scoring_interval_s(det.interval_s)
        if step != det.interval_s:
            # Short intervals are modeled on window sums (service.stats.windows).
            start_s, counts = window_sums(start_s, counts, interval_s=det.interval_s,
                                          window_s=step)
        exclude = _excluded(conn, detector_id, start_s, lo, as_of_s)
    try:
        result = _fit(det, start_s, counts, exclude, interval_s=step, as_of_s=as_of_s,
                      settings=settings)
    except Exception as exc:  # noqa: BLE001 - one detector's failure must not stop the network
        return _Fitted({"detector_id": detector_id, "status": "failed",
                        "reason": f"{type(exc).__name__}: {exc}"}, det.group_id, step, None,
                       started)
    out: dict[str, Any] = {"detector_id": detector_id, "status": result.status,
                           "reason": result.reason, "intervals": int(start_s.size)}
    return _Fitted(out, det.group_id, step, result, started)


def _store_fit(engine: Engine, f: _Fitted, *, as_of_s: int, settings: Settings,
               thresholds: bool) -> dict[str, Any]:
    out, result = f.out, f.result
    if result is None or result.status != "fitted" or result.baseline is None:
        return out
    detector_id = out["detector_id"]
    summary = summarize(result)
    thresholds_json = None
    if thresholds:
        thresholds_json = thresholds_to_json(thresholds_for_baseline(
            result.baseline, interval_s=f.step,
            false_alerts_per_week=settings.false_alerts_per_week))
    now = time.time()
    with write_transaction(engine) as conn:
        baseline_id = insert_baseline(conn, detector_id=detector_id, baseline=result.baseline,
                                      fitted_s=now, as_of_s=as_of_s, summary=summary,
                                      thresholds_json=thresholds_json)
        point_scoring_at(conn, detector_id=detector_id, baseline_id=baseline_id,
                         as_of_s=as_of_s, now=now)
    out.update(baseline_id=baseline_id, summary=summary,
               seconds=round(time.perf_counter() - f.started, 3))
    return out


def _fit(det: Any, start_s: np.ndarray, counts: np.ndarray, exclude: np.ndarray, *,
         interval_s: int, as_of_s: int, settings: Settings) -> bl.FitResult:
    """The baseline of a detector's registry row ``det`` from its history on the
    ``interval_s`` grid (the scoring interval)."""
    return bl.fit_baseline(
        start_s, counts, interval_s=interval_s, timezone=det.timezone,
        holiday_calendar=det.holiday_calendar, as_of_s=as_of_s,
        window_days=settings.fit_window_days, half_life_days=settings.fit_half_life_days,
        min_completeness=settings.fit_min_completeness, exclude=exclude)


# Most detectors of one group fitted together in one process (see _group_units).
MAX_GROUP_UNIT = 32

_worker_engine: Engine | None = None
_worker_settings: Settings | None = None


def _init_worker(settings_json: str) -> None:
    global _worker_engine, _worker_settings
    from threadpoolctl import threadpool_limits

    # One BLAS thread per worker: N workers each running a multi-threaded BLAS on N cores
    # oversubscribe the machine (measured: threshold derivation 10x slower).
    threadpool_limits(1)
    _worker_settings = Settings.model_validate_json(settings_json)
    _worker_engine = make_worker_engine(_worker_settings)


def _fit_chunk(detector_ids: list[str], as_of_s: int, thresholds: bool) -> list[dict[str, Any]]:
    assert _worker_engine is not None and _worker_settings is not None
    return fit_together(_worker_engine, detector_ids, as_of_s=as_of_s,
                        settings=_worker_settings, thresholds=thresholds)


def all_detector_ids(engine: Engine) -> list[str]:
    with read_transaction(engine) as conn:
        return [r[0] for r in conn.execute(select(models.detectors.c.detector_id)
                                           .order_by(models.detectors.c.detector_id))]


def default_as_of(engine: Engine) -> int:
    """The end of the latest stored interval day: fit on everything stored so far."""
    with read_transaction(engine) as conn:
        latest = conn.exec_driver_sql("SELECT max(start_s) FROM counts").scalar()
    return int(latest) + 1 if latest is not None else int(time.time())


def fit_many(settings: Settings, engine: Engine, *, detector_ids: Sequence[str] | None = None,
             as_of_s: int | None = None, workers: int = 1, thresholds: bool = True,
             progress: Callable[[int], None] | None = None) -> list[dict[str, Any]]:
    """Fit many detectors, over ``workers`` processes; results in detector order. The
    detectors of one group are fitted together (one process), so that their dispersion is
    pooled across the group (``fit_together``)."""
    # A detector named twice is fitted once (a second fit would store a second baseline).
    ids = list(dict.fromkeys(detector_ids)) if detector_ids else all_detector_ids(engine)
    as_of = as_of_s if as_of_s is not None else default_as_of(engine)
    units = _group_units(engine, ids)
    results: list[dict[str, Any]] = []
    if workers <= 1 or len(ids) < 4:
        for unit in units:
            results.extend(fit_together(engine, unit, as_of_s=as_of, settings=settings,
                                        thresholds=thresholds))
            if progress:
                progress(len(unit))
    else:
        size = max(1, min(25, len(ids) // (workers * 4) or 1))
        chunks: list[list[str]] = []
        for unit in units:  # a group is never split across chunks
            if chunks and len(chunks[-1]) + len(unit) <= size:
                chunks[-1].extend(unit)
            else:
                chunks.append(list(unit))
        with ProcessPoolExecutor(max_workers=workers, initializer=_init_worker,
                                 initargs=(settings.model_dump_json(),)) as pool:
            futures = [pool.submit(_fit_chunk, c, as_of, thresholds) for c in chunks]
            for fut in as_completed(futures):
                part = fut.result()
                results.extend(part)
                if progress:
                    progress(len(part))
    order = {det: i for i, det in enumerate(ids)}
    results.sort(key=lambda r: order[r["detector_id"]])
    return results


def _group_units(engine: Engine, ids: Sequence[str]) -> list[list[str]]:
    """``ids`` as units fitted together: each group's detectors (in the order given, in
    pieces of at most ``MAX_GROUP_UNIT``), and each detector of no group alone, in order of
    first appearance."""
    d = models.detectors
    with read_transaction(engine) as conn:
        group_of = dict(conn.execute(select(d.c.detector_id, d.c.group_id)).all())
    units: dict[str, list[str]] = {}
    for det in ids:
        group = group_of.get(det)
        key = f"g:{group}" if group is not None else f"d:{det}"
        units.setdefault(key, []).append(det)
    # A very large group (a whole corridor under one code) would put one process to work alone:
    # it is fitted in pieces, each pooled with its own members and the stored baselines of
    # the rest (as a detector refitted alone is).
    return [unit[i:i + MAX_GROUP_UNIT] for unit in units.values()
            for i in range(0, len(unit), MAX_GROUP_UNIT)]
