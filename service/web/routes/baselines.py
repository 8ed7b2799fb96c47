"""Baselines: fit them, and serve what a detector should count and the planners' figures."""

from __future__ import annotations

import time
from datetime import date
from typing import Annotated, Any, Literal

from fastapi import APIRouter, Path, Query, Response
from fastapi.concurrency import run_in_threadpool

from service.domain import DAY_TYPES, DETECTOR_ID_PATTERN
from service.errors import NotFound, ValidationFailed
from service.pipeline import baseline_day
from service.pipeline import fit as fitting
from service.timefmt import parse_rfc3339
from service.web.deps import AdminDep, EngineDep, ReadDep, SettingsDep
from service.web.schemas import BaselineDay, BaselineProfile, FitRequest, FitResult

router = APIRouter(prefix="/v1", tags=["baselines"])
DetectorId = Annotated[str, Path(pattern=DETECTOR_ID_PATTERN)]
# Dates a baseline day is served for: wide enough for any planning question, and inside what
# time zone rules and epoch seconds handle without overflow.
FIRST_DATE, LAST_DATE = date(1990, 1, 1), date(2100, 12, 31)
WARNING_HEADER = "X-Baseline-Warning"  # a date far outside the fit window


@router.post("/baselines/fit", response_model=FitResult)
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


@router.get("/detectors/{detector_id}/baseline", response_model=BaselineDay)
def get_baseline(
    detector_id: DetectorId, engine: EngineDep, settings: SettingsDep, _: ReadDep,
    response: Response,
    date_: Annotated[str | None, Query(
        alias="date", description=f"Local date YYYY-MM-DD, {FIRST_DATE}..{LAST_DATE}.")] = None,
    day_type: Annotated[Literal[DAY_TYPES] | None, Query()] = None,  # type: ignore[valid-type]
    level: Annotated[float, Query(gt=0.5, lt=1.0, description="Central interval level.")] = 0.95,
) -> dict[str, Any]:
    """Expected count and predictive interval for every interval of a local day."""
    if (date_ is None) == (day_type is None):
        raise ValidationFailed("give exactly one of date=YYYY-MM-DD or "
                               "day_type=weekday|saturday|sunday_holiday")
    day = _baseline_date(date_) if date_ is not None else None
    figures = baseline_day.baseline_day(engine, detector_id, day=day, day_type=day_type,
                                        level=level, validity_days=settings.baseline_validity_days)
    if figures["warning"]:
        response.headers[WARNING_HEADER] = figures["warning"]
    return {**figures, "date": date_}


@router.get("/detectors/{detector_id}/baseline/profile", response_model=BaselineProfile)
def get_profile(detector_id: DetectorId, engine: EngineDep, _: ReadDep) -> dict[str, Any]:
    """Expected daily volume per day type, hourly volumes and the busiest expected hour."""
    return baseline_day.profile(engine, detector_id)
