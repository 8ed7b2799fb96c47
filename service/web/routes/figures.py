"""Planners' routes: clean volumes (flagged and missing intervals imputed) and the standard
annual figures of a detector or a group, with their uncertainty."""

from __future__ import annotations

import csv
import io
from typing import Annotated, Any

from fastapi import APIRouter, Path, Query, Request, Response

from service.domain import DETECTOR_ID_PATTERN
from service.errors import ValidationFailed
from service.pipeline import figures as planning
from service.pipeline import volumes as clean
from service.timefmt import parse_rfc3339
from service.web.deps import EngineDep, ReadDep
from service.web.schemas import DirectionalReport, FiguresReport, VolumesPage

router = APIRouter(prefix="/v1", tags=["figures"])
DetectorId = Annotated[str, Path(pattern=DETECTOR_ID_PATTERN, description="Detector id.")]
GroupId = Annotated[str, Path(pattern=DETECTOR_ID_PATTERN, description="Group id.")]
Level = Annotated[float, Query(gt=0.5, lt=1.0, description="Central interval level.")]
Year = Annotated[int, Query(ge=planning.FIRST_YEAR, le=planning.LAST_YEAR,
                            description="Calendar year, local to the detector.")]
VOLUME_COLUMNS = ("start", "volume", "observed", "imputed", "imputed_share", "low", "high",
                  "intervals")
CSV_TYPE = "text/csv"


def _time(value: str, name: str) -> int:
    try:
        return parse_rfc3339(value)
    except ValueError as exc:
        raise ValidationFailed(f"{name}: {exc}") from None


def _volumes(request: Request, engine: Any, subject: str, ids: list[str], from_: str, to: str,
             step: str, level: float) -> Any:
    lo, hi = _time(from_, "from"), _time(to, "to")
    res = clean.volumes(engine, ids, from_s=lo, until_s=hi, step=step, level=level)
    if CSV_TYPE in request.headers.get("accept", ""):
        buf = io.StringIO()
        writer = csv.writer(buf, lineterminator="\n")
        writer.writerow(VOLUME_COLUMNS)
        for row in res["data"]:
            writer.writerow([str(row[c]).lower() if isinstance(row[c], bool) else row[c]
                             for c in VOLUME_COLUMNS])
        return Response(buf.getvalue(), media_type=CSV_TYPE)
    return {"subject": subject, "detectors": ids, "step": step, "level": level, **res}


FROM = Query(alias="from", description="RFC 3339 start, inclusive.")
TO = Query(description="RFC 3339 end, exclusive.")
STEP = Query(description=f"Bucket: {clean.STEP_TEXT}.")
CSV_RESPONSE = {200: {"content": {CSV_TYPE: {"schema": {"type": "string"}}},
                     "description": "JSON (VolumesPage), or CSV with Accept: text/csv."}}
VOLUMES_DOC = ("Clean volumes: observed counts, and for missing or replaced (alert) intervals the "
               "baseline times the day's level, marked imputed with an interval; "
               "Accept: text/csv for CSV.")


@router.get("/detectors/{detector_id}/volumes", response_model=VolumesPage,
            description=VOLUMES_DOC, responses=CSV_RESPONSE)
def detector_volumes(request: Request, detector_id: DetectorId, engine: EngineDep, _: ReadDep,
                     from_: Annotated[str, FROM], to: Annotated[str, TO],
                     step: Annotated[str, STEP] = "hour", level: Level = 0.95) -> Any:
    return _volumes(request, engine, detector_id, [detector_id], from_, to, step, level)


@router.get("/groups/{group_id}/volumes", response_model=VolumesPage, description=VOLUMES_DOC,
            responses=CSV_RESPONSE)
def group_volumes(request: Request, group_id: GroupId, engine: EngineDep, _: ReadDep,
                  from_: Annotated[str, FROM], to: Annotated[str, TO],
                  step: Annotated[str, STEP] = "hour", level: Level = 0.95) -> Any:
    clean.step_seconds(step)  # an unsupported step is refused before any work
    ids = clean.group_member_ids(engine, group_id)
    return _volumes(request, engine, f"group:{group_id}", ids, from_, to, step, level)


@router.get("/detectors/{detector_id}/figures", response_model=FiguresReport)
def detector_figures(detector_id: DetectorId, engine: EngineDep, _: ReadDep, year: Year,
                     level: Level = 0.95) -> dict[str, Any]:
    """A year's AADT (AASHTO), ADT, factors, K30, DHV and AM/PM peak hours with PHF."""
    return planning.figures(engine, [detector_id], year=year, level=level)


@router.get("/groups/{group_id}/figures", response_model=FiguresReport)
def group_figures(group_id: GroupId, engine: EngineDep, _: ReadDep, year: Year,
                  level: Level = 0.95) -> dict[str, Any]:
    """The same figures for the sum of a group's detectors (e.g. all lanes of a station)."""
    ids = clean.group_member_ids(engine, group_id)
    return planning.figures(engine, ids, year=year, level=level, subject=f"group:{group_id}")


@router.get("/groups/{group_id}/directional", response_model=DirectionalReport)
def group_directional(group_id: GroupId, engine: EngineDep, _: ReadDep, year: Year,
                      opposite: Annotated[str, Query(pattern=DETECTOR_ID_PATTERN, description=(
                          "The group of the opposite direction."))],
                      level: Level = 0.95) -> dict[str, Any]:
    """Directional distribution D of this group and the opposite-direction group."""
    if opposite == group_id:
        raise ValidationFailed("opposite must name the other direction's group, not this one")
    a = clean.group_member_ids(engine, group_id)
    b = clean.group_member_ids(engine, opposite)
    res = planning.directional(engine, a, b, year=year, level=level)
    res["peak_direction"] = group_id if res["peak_direction"] == "a" else opposite
    return res
