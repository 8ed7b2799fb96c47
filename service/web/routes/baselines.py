"""Baselines: fit them, and serve what a detector should count and the planners' figures."""

from __future__ import annotations

import time
from datetime import date, datetime, timedelta
from typing import Annotated, Any, Literal
from zoneinfo import ZoneInfo

import numpy as np
import orjson
from fastapi import APIRouter, Path, Query
from fastapi.concurrency import run_in_threadpool
from pydantic import BaseModel, Field
from sqlalchemy import select

from service.domain import DETECTOR_ID_PATTERN
from service.errors import NotFound, ValidationFailed
from service.pipeline import fit as fitting
from service.pipeline.score import load_baseline
from service.stats import baseline as bl
from service.store import tables as models
from service.store.engine import read_transaction
from service.timefmt import format_utc, parse_rfc3339
from service.web.deps import AdminDep, EngineDep, ReadDep, SettingsDep

router = APIRouter(prefix="/v1", tags=["baselines"])
DetectorId = Annotated[str, Path(pattern=DETECTOR_ID_PATTERN)]
# Dates a baseline day is served for: wide enough for any planning question, and inside what
# time zone rules and epoch seconds handle without overflow.
FIRST_DATE, LAST_DATE = date(1990, 1, 1), date(2100, 12, 31)


class FitRequest(BaseModel):
    detector_ids: list[str] | None = Field(None, description="Default: every detector.")
    as_of: str | None = Field(None, description="RFC 3339 end of the history window; default: "
                                                "just after the latest stored count.")


@router.post("/baselines/fit")
async def fit(req: FitRequest, engine: EngineDep, settings: SettingsDep, _: AdminDep
              ) -> dict[str, Any]:
    """Fit baselines now (one process); `tallyward fit --workers N` is faster for networks."""
    as_of = None
    if req.as_of is not None:
        try:
            as_of = parse_rfc3339(req.as_of)
        except ValueError as exc:
            raise ValidationFailed(f"as_of: {exc}") from None
    if req.detector_ids:
        known = set(fitting.all_detector_ids(engine))
        unknown = [d for d in req.detector_ids if d not in known]
        if unknown:
            raise NotFound(f"unknown detector(s): {', '.join(unknown[:10])}")
    started = time.perf_counter()
    results = await run_in_threadpool(fitting.fit_many, settings, engine,
                                      detector_ids=req.detector_ids, as_of_s=as_of, workers=1)
    return {"seconds": round(time.perf_counter() - started, 2),
            "data": [{k: r.get(k) for k in ("detector_id", "status", "reason", "baseline_id")}
                     for r in results]}


def _current(engine, detector_id: str) -> tuple[Any, Any, bl.Baseline]:  # type: ignore[no-untyped-def]
    d, b = models.detectors, models.baselines
    with read_transaction(engine) as conn:
        det = conn.execute(select(d).where(d.c.detector_id == detector_id)).first()
        if det is None:
            raise NotFound(f"unknown detector {detector_id!r}")
        row = conn.execute(select(b.c.baseline_id, b.c.fitted_s, b.c.as_of_s, b.c.window_start_s,
                                  b.c.window_end_s, b.c.summary)
                           .where(b.c.detector_id == detector_id)
                           .order_by(b.c.baseline_id.desc()).limit(1)).first()
        if row is None:
            raise NotFound(f"detector {detector_id!r} has no baseline yet; fit one with "
                           "POST /v1/baselines/fit or `tallyward fit`", code="no_baseline")
        base = load_baseline(conn, row.baseline_id)
    return det, row, base


def _model(row: Any, base: bl.Baseline, day_type: str) -> dict[str, Any]:
    prof = base.profiles[day_type]
    return {
        "baseline_id": row.baseline_id, "fitted_at": format_utc(row.fitted_s),
        "window": {"start": format_utc(row.window_start_s), "end": format_utc(row.window_end_s)},
        "day_type": day_type, "fitted_from": prof.fitted_from,
        "fallback": prof.fitted_from != day_type,
        "distribution": prof.distribution, "day_alpha": prof.day_alpha,
        "interval_alpha": prof.interval_alpha, "dispersion_p_value": prof.dispersion_p_value,
        "days_used": prof.days_used,
    }


def _baseline_date(text: str) -> date:
    try:
        day = date.fromisoformat(text) if len(text) == 10 else None
    except ValueError:
        day = None
    if day is None:
        raise ValidationFailed(f"date {text[:40]!r} is not a calendar date YYYY-MM-DD")
    if not FIRST_DATE <= day <= LAST_DATE:
        raise ValidationFailed(f"date {text} is outside {FIRST_DATE}..{LAST_DATE}, the dates a "
                               "baseline day is served for")
    return day


@router.get("/detectors/{detector_id}/baseline")
def get_baseline(
    detector_id: DetectorId, engine: EngineDep, _: ReadDep,
    date_: Annotated[str | None, Query(
        alias="date", description=f"Local date YYYY-MM-DD, {FIRST_DATE}..{LAST_DATE}.")] = None,
    day_type: Annotated[Literal["weekday", "saturday", "sunday_holiday"] | None, Query()] = None,
    level: Annotated[float, Query(gt=0.5, lt=1.0, description="Central interval level.")] = 0.95,
) -> dict[str, Any]:
    """Expected count and predictive interval for every interval of a local day."""
    if (date_ is None) == (day_type is None):
        raise ValidationFailed("give exactly one of date=YYYY-MM-DD or "
                               "day_type=weekday|saturday|sunday_holiday")
    day = _baseline_date(date_) if date_ is not None else None
    det, row, base = _current(engine, detector_id)
    step = det.interval_s
    zone = ZoneInfo(det.timezone)
    if day is not None:
        lo = int(datetime(day.year, day.month, day.day, tzinfo=zone).timestamp())
        nxt = day + timedelta(days=1)
        hi = int(datetime(nxt.year, nxt.month, nxt.day, tzinfo=zone).timestamp())
        starts = np.arange(lo, hi, step, dtype=np.int64)
        grid = bl.local_time_grid(starts, interval_s=step, timezone=det.timezone,
                                  holiday_calendar=det.holiday_calendar)
        codes, bins = grid.day_type, grid.bin
        labels = [datetime.fromtimestamp(int(t), zone).isoformat() for t in starts]
        name = bl.DAY_TYPES[int(codes[0])]
    else:
        assert day_type is not None
        bins = np.arange(base.bins_per_day)
        codes = np.full(bins.size, bl.DAY_TYPES.index(day_type))
        labels = [f"{int(b) * step // 3600:02d}:{int(b) * step % 3600 // 60:02d}" for b in bins]
        name = day_type
    mu, log_se, day_alpha, interval_alpha = base.expected_for(codes, bins)
    low, high = bl.predictive_interval(mu, log_se, day_alpha, interval_alpha, level=level)
    data = [{"start": lab, "expected": round(float(m), 3), "low": int(lo_), "high": int(hi_)}
            for lab, m, lo_, hi_ in zip(labels, mu, low, high, strict=True)]
    return {"detector_id": detector_id, "date": date_, "day_type": name, "level": level,
            "interval_s": step, "model": _model(row, base, name),
            "expected_total": round(float(np.sum(mu)), 1), "data": data}


@router.get("/detectors/{detector_id}/baseline/profile")
def get_profile(detector_id: DetectorId, engine: EngineDep, _: ReadDep) -> dict[str, Any]:
    """Planners' figures: expected daily volume per day type, hourly volumes, peak hour, K-factor."""
    det, row, base = _current(engine, detector_id)
    summary = bl.daily_profile_summary(base, lanes=det.lanes)
    return {"detector_id": detector_id, "lanes": det.lanes, "baseline_id": row.baseline_id,
            "fitted_at": format_utc(row.fitted_s), "fit": orjson.loads(row.summary),
            "day_types": summary}
