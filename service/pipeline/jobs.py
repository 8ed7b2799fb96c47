"""Long tasks run by workers: fit jobs asked for through the API, and rolling refits.

Fit jobs: ``submit_fit`` queues a job of one item per detector (``service.store.jobs``);
``run_job_items`` fits one claimed item at a time, so a worker's other tasks (scoring) take
turns between detectors, and several workers share a job through the database.

Rolling refits (``run_refits``): every detector has a refit schedule on the scoring clock
(wall, or the latest interval in data-clock mode).

- A detector without a baseline is *learning* until its history spans ``first_fit_days``
  (start of its first stored interval to the end of its latest); its first fit is then due
  at once.
  Should that fit find too little usable history (gaps), it is tried again an hour later.
- A detector with a baseline is refitted at ``refit_hour`` local time (its own time zone)
  each night, on the latest window (``fit_window_days`` up to the clock), unless its baseline
  was fitted on data up to that moment already (e.g. by ``tallyward fit``).
- A refit stores a new baseline and points scoring at it in one transaction: until that
  commits the old baseline keeps judging, and scoring never stops (alerts record the
  baseline that judged them). A refit that fails keeps the old baseline until the next night.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Sequence
from datetime import datetime, timedelta
from datetime import time as dtime
from typing import Any
from zoneinfo import ZoneInfo

from service.config import Settings
from service.pipeline import fit as fitting
from service.store import jobs as store
from service.store.engine import read_transaction
from service.store.scoring import clock_now

log = logging.getLogger("tallyward.jobs")

DAY_S = 86_400
FIRST_FIT_RETRY_S = 3600  # scoring-clock seconds before a failed first fit is tried again
NO_HISTORY_RECHECK_S = 3600  # scoring-clock seconds between looks at a detector with no counts


# ----------------------------------------------------------------------------- fit jobs


def submit_fit(engine: Any, *, detector_ids: Sequence[str], as_of_s: int | None,
               thresholds: bool = True, created_by: str | None = None) -> str:
    """Queue a fit of these detectors; the job id. ``as_of_s`` None: just after the latest
    stored count, fixed now so every item of the job fits the same window."""
    as_of = as_of_s if as_of_s is not None else fitting.default_as_of(engine)
    return store.create_job(engine, kind="fit", detector_ids=list(detector_ids),
                            params={"as_of_s": int(as_of), "thresholds": bool(thresholds)},
                            created_by=created_by)


def run_job_items(engine: Any, settings: Settings, *, limit: int = 1) -> int:
    """Claim and run up to ``limit`` job items (one detector's fit each); how many ran."""
    claims = store.claim_items(engine, limit=limit)
    for claim in claims:
        started = time.perf_counter()
        try:
            result = fitting.fit_one(engine, claim.detector_id,
                                     as_of_s=int(claim.params["as_of_s"]), settings=settings,
                                     thresholds=bool(claim.params.get("thresholds", True)))
        except Exception as exc:  # noqa: BLE001 - one detector's failure is its result
            log.exception("fit job item failed", extra={"fields": {
                "job_id": claim.job_id, "detector_id": claim.detector_id}})
            result = {"status": "failed", "reason": f"{type(exc).__name__}: {exc}"[:300]}
        result.setdefault("seconds", round(time.perf_counter() - started, 3))
        store.finish_item(engine, claim, result)
    return len(claims)


# ----------------------------------------------------------------------------- refits


def last_refit_moment(clock_s: float, timezone: str, hour: int) -> int:
    """The latest ``hour``:00 local time (in ``timezone``) at or before ``clock_s`` (epoch s)."""
    zone = ZoneInfo(timezone)
    local = datetime.fromtimestamp(clock_s, zone)
    moment = datetime.combine(local.date(), dtime(hour), tzinfo=zone)
    if moment.timestamp() > clock_s:
        moment = datetime.combine(local.date() - timedelta(days=1), dtime(hour), tzinfo=zone)
    return int(moment.timestamp())


def next_refit_moment(clock_s: float, timezone: str, hour: int) -> int:
    """The first ``hour``:00 local time strictly after ``clock_s`` (epoch s)."""
    zone = ZoneInfo(timezone)
    last = datetime.fromtimestamp(last_refit_moment(clock_s, timezone, hour), zone)
    return int(datetime.combine(last.date() + timedelta(days=1), dtime(hour),
                                tzinfo=zone).timestamp())


def refit_as_of(clock: float, settings: Settings) -> int:
    """The end of a refit's window: the clock (data clock: just after the latest interval)."""
    return int(clock) + 1 if settings.clock == "data" else int(clock)


def run_refits(engine: Any, settings: Settings, *, max_fits: int = 1) -> int:
    """Decide the due refit schedules and run at most ``max_fits`` fits; how many schedules
    were handled (0: nothing due)."""
    store.ensure_refit_rows(engine)
    with read_transaction(engine) as conn:
        clock = clock_now(conn, settings)
    claims = store.claim_refits(engine, clock=clock)
    handled, fits, released = 0, 0, []
    hour, need_s = settings.refit_hour, int(round(settings.first_fit_days * DAY_S))
    for c in claims:
        nxt = next_refit_moment(clock, c.timezone, hour)
        if c.baseline_id is None:
            if c.history_s is None or c.history_s < need_s:
                # Look again when enough more time has passed for the history to suffice.
                wait = NO_HISTORY_RECHECK_S if c.history_s is None else need_s - c.history_s
                store.finish_refit(engine, c.detector_id, due_s=int(clock) + wait)
                handled += 1
                continue
        elif c.baseline_as_of_s is not None and \
                c.baseline_as_of_s >= last_refit_moment(clock, c.timezone, hour):
            store.finish_refit(engine, c.detector_id, due_s=nxt)
            handled += 1
            continue
        if fits >= max_fits:
            released.append(c.detector_id)
            continue
        fits += 1
        handled += 1
        result = _fit(engine, c.detector_id, as_of_s=refit_as_of(clock, settings),
                      settings=settings)
        if result["status"] != "fitted" and c.baseline_id is None:
            nxt = int(clock) + FIRST_FIT_RETRY_S
        log.info("refit" if c.baseline_id is not None else "first fit", extra={"fields": {
            "detector_id": c.detector_id, "status": result["status"],
            "reason": result.get("reason"), "baseline_id": result.get("baseline_id"),
            "seconds": result.get("seconds")}})
        store.finish_refit(engine, c.detector_id, due_s=nxt, attempted_s=int(clock),
                           status=result["status"], reason=result.get("reason"))
    store.release_refits(engine, released)
    return handled


def _fit(engine: Any, detector_id: str, *, as_of_s: int, settings: Settings) -> dict[str, Any]:
    try:
        return fitting.fit_one(engine, detector_id, as_of_s=as_of_s, settings=settings)
    except Exception as exc:  # noqa: BLE001 - recorded on the schedule; retried later
        log.exception("refit failed", extra={"fields": {"detector_id": detector_id}})
        return {"status": "failed", "reason": f"{type(exc).__name__}: {exc}"[:300]}
