"""Baselines: fit them, and serve what a detector should count and the planners' figures."""

from __future__ import annotations

from datetime import date
from typing import Annotated, Any, Literal

from fastapi import APIRouter, Path, Query, Request, Response
from pydantic import BaseModel, Field

from service.domain import DAY_TYPES, DETECTOR_ID_PATTERN
from service.errors import NotFound, ValidationFailed
from service.pipeline import baseline_day
from service.pipeline import fit as fitting
from service.pipeline import jobs as job_runner
from service.timefmt import parse_rfc3339
from service.web import paging
from service.web.deps import AdminDep, EngineDep, ReadDep, SettingsDep
from service.web.schemas import BaselineDay, BaselineProfile, FitRequest

router = APIRouter(prefix="/v1", tags=["baselines"])
DetectorId = Annotated[str, Path(pattern=DETECTOR_ID_PATTERN)]
# Dates a baseline day is served for: wide enough for any planning question, and inside what
# time zone rules and epoch seconds handle without overflow.
FIRST_DATE, LAST_DATE = date(1990, 1, 1), date(2100, 12, 31)
WARNING_HEADER = "X-Baseline-Warning"  # a date far outside the fit window


class FitJobAccepted(BaseModel):
    id: str = Field(description="The job id: poll GET /v1/jobs/{id}.")
    state: Literal["queued", "done"] = Field(description="'done' at once for no detectors.")
    total: int = Field(description="Detectors to fit.")
    href: str = Field(description="Where to poll the job.")


@router.post("/baselines/fit", response_model=FitJobAccepted, status_code=202)
def fit(req: FitRequest, engine: EngineDep, settings: SettingsDep, who: AdminDep,
        response: Response) -> dict[str, Any]:
    """Queue baseline fits as a job (202 with its id); a worker (or the inline runner) runs it."""
    as_of = None
    if req.as_of is not None:
        try:
            as_of = parse_rfc3339(req.as_of)
        except ValueError as exc:
            raise ValidationFailed(f"as_of: {exc}") from None
    known = fitting.all_detector_ids(engine)
    if req.detector_ids:
        known_set = set(known)
        unknown = [d for d in req.detector_ids if d not in known_set]
        if unknown:
            raise NotFound(f"unknown detector(s): {', '.join(unknown[:10])}")
        ids = list(dict.fromkeys(req.detector_ids))
    else:
        ids = known
    job_id = job_runner.submit_fit(engine, detector_ids=ids, as_of_s=as_of,
                                   created_by=getattr(who, "name", None))
    href = f"/v1/jobs/{job_id}"
    response.headers["Location"] = href
    return {"id": job_id, "state": "queued" if ids else "done", "total": len(ids),
            "href": href}


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


BASELINE_CSV_COLUMNS = ("detector_id", "day_type", "start", "expected", "low", "high")
BASELINE_CSV = {200: {"content": {"text/csv": {"schema": {"type": "string"}}},
                      "description": "JSON (BaselineDay), or CSV with Accept: text/csv (columns "
                                     f"{', '.join(BASELINE_CSV_COLUMNS)})."}}


@router.get("/detectors/{detector_id}/baseline", response_model=BaselineDay,
            responses=BASELINE_CSV)
def get_baseline(
    request: Request, detector_id: DetectorId, engine: EngineDep, settings: SettingsDep,
    _: ReadDep, response: Response,
    date_: Annotated[str | None, Query(
        alias="date", description=f"Local date YYYY-MM-DD, {FIRST_DATE}..{LAST_DATE}.")] = None,
    day_type: Annotated[Literal[DAY_TYPES] | None, Query()] = None,  # type: ignore[valid-type]
    level: Annotated[float, Query(gt=0.5, lt=1.0, description="Central interval level.")] = 0.95,
) -> Any:
    """Expected count and predictive interval for every interval of a local day."""
    if (date_ is None) == (day_type is None):
        raise ValidationFailed("give exactly one of date=YYYY-MM-DD or "
                               "day_type=weekday|saturday|sunday_holiday")
    day = _baseline_date(date_) if date_ is not None else None
    figures = baseline_day.baseline_day(engine, detector_id, day=day, day_type=day_type,
                                        level=level, validity_days=settings.baseline_validity_days)
    if figures["warning"]:
        response.headers[WARNING_HEADER] = figures["warning"]
    if paging.wants_csv(request):
        rows = ([detector_id, figures["day_type"], p["start"], p["expected"], p["low"], p["high"]]
                for p in figures["data"])
        headers = {WARNING_HEADER: figures["warning"]} if figures["warning"] else None
        return paging.csv_response(paging.csv_text(BASELINE_CSV_COLUMNS, rows),
                                   filename=f"{detector_id}_{date_ or day_type}_baseline.csv",
                                   headers=headers)
    return {**figures, "date": date_}


@router.get("/detectors/{detector_id}/baseline/profile", response_model=BaselineProfile)
def get_profile(detector_id: DetectorId, engine: EngineDep, _: ReadDep) -> dict[str, Any]:
    """Expected daily volume per day type, hourly volumes and the busiest expected hour."""
    return baseline_day.profile(engine, detector_id)
