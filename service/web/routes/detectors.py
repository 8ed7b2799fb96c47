"""Detector registry routes."""

from __future__ import annotations

from typing import Annotated, Any

import orjson
from fastapi import APIRouter, Path, Query, Request, Response
from fastapi.concurrency import run_in_threadpool
from pydantic import AfterValidator

from service.domain import DETECTOR_ID_PATTERN, plain_text
from service.errors import BadRequest, ValidationFailed
from service.pipeline import ingest
from service.store import detectors as registry
from service.store.engine import write_transaction
from service.store.scoring import clock_now, period_clock_now
from service.timefmt import parse_rfc3339
from service.web.deps import AdminDep, EngineDep, OperateDep, ReadDep, SettingsDep
from service.web.openapi import IMPORT_BODY
from service.web.schemas import (
    DetectorCreate,
    DetectorImportResult,
    DetectorPublic,
    DetectorsPublic,
    ServiceChange,
    ServicePeriodsPublic,
)

router = APIRouter(prefix="/v1/detectors", tags=["detectors"])
DetectorId = Annotated[str, Path(pattern=DETECTOR_ID_PATTERN, description="Detector id.")]


@router.put("/{detector_id}", response_model=DetectorPublic)
def put_detector(detector_id: DetectorId, spec: DetectorCreate, engine: EngineDep, _: AdminDep,
                 response: Response) -> dict[str, Any]:
    """Create or update a detector."""
    with write_transaction(engine) as conn:
        created = registry.upsert_detector(conn, detector_id, spec)
    response.status_code = 201 if created else 200
    return registry.get_detector(engine, detector_id)


SERVICE_DOC = """Put a detector out of service (with a reason and optionally `until`), back in
service, or retire it.

Out of service: its counts are still stored and scored, but alerts it raises are kept as
suppressed (listed by `GET /v1/alerts?suppressed=true`); at `until` (wall clock) it returns to
service by itself, and its suppressed alerts still open are raised then. The period out of
service is kept after it returns: counts whose start lies in it are flagged `out_of_service` in
`GET /v1/counts` and imputed by the clean volumes. Retired: no longer
expected to report, so missing data raises nothing; kept for history. Operate and admin keys
may set `in_service` and `out_of_service`; only admin keys may retire a detector or change a
retired one. 422: unknown state, `until` not in the future or given with another state,
missing reason."""


@router.patch("/{detector_id}", response_model=DetectorPublic, description=SERVICE_DOC,
              summary="Set a detector's service state")
def patch_detector(detector_id: DetectorId, change: ServiceChange, engine: EngineDep,
                   settings: SettingsDep, principal: OperateDep) -> dict[str, Any]:
    until_s = None
    if change.until is not None:
        try:
            until_s = parse_rfc3339(change.until)
        except ValueError as exc:
            raise ValidationFailed(f"until: {str(exc).replace('start ', '', 1)}") from None
    return registry.set_service_state(
        engine, detector_id, state=change.state, reason=change.reason, until_s=until_s,
        by=principal.name, may_retire=principal.may("admin"),
        clock=lambda conn: clock_now(conn, settings),
        period_clock=lambda conn: period_clock_now(conn, settings))


@router.get("/{detector_id}/service-periods", response_model=ServicePeriodsPublic,
            response_model_by_alias=True, summary="A detector's out-of-service periods")
def get_service_periods(detector_id: DetectorId, engine: EngineDep, _: ReadDep,
                        limit: int = Query(100, ge=1, le=1000)) -> dict[str, Any]:
    """The periods the detector was (or is) out of service, newest first: start, end (null
    while open), reason, who took it out and who returned it. Counts whose start lies in a
    period are flagged `out_of_service` in `GET /v1/counts`."""
    return registry.service_periods(engine, detector_id, limit=limit)


@router.get("", response_model=DetectorsPublic)
def list_detectors(engine: EngineDep, _: ReadDep,
                   group: Annotated[str | None, Query(max_length=64), AfterValidator(plain_text)] = None,
                   after: Annotated[str | None, Query(max_length=64, description="Page after this "
                                                      "detector id."), AfterValidator(plain_text)] = None,
                   limit: int = Query(1000, ge=1, le=10_000)) -> dict[str, Any]:
    """List detectors in id order."""
    data, total = registry.list_detectors(engine, group=group, limit=limit, after=after)
    return {"data": data, "count": total}


@router.get("/{detector_id}", response_model=DetectorPublic)
def get_detector(detector_id: DetectorId, engine: EngineDep, _: ReadDep) -> dict[str, Any]:
    """One detector."""
    return registry.get_detector(engine, detector_id)


import_router = APIRouter(prefix="/v1", tags=["detectors"])


IMPORT_DOC = """Create or update detectors from a GeoJSON FeatureCollection (RFC 7946).

Partial, like a count batch: 200 every feature stored; 422 some features were refused (each
listed in `errors` with its index and what is wrong) and **all the valid ones were stored**;
400 the document is not a FeatureCollection (nothing stored); 415 compressed (gzip is not
accepted). Text fields refuse control characters (NUL, tab, line breaks) by field name."""


@import_router.post("/detectors:import", response_model=DetectorImportResult,
                    responses={422: {"model": DetectorImportResult}},
                    summary="Create or update detectors from a GeoJSON FeatureCollection",
                    description=IMPORT_DOC, openapi_extra=IMPORT_BODY)
async def import_detectors(request: Request, engine: EngineDep, _: AdminDep) -> Response:
    body = await request.body()
    ingest.refuse_compressed(body, request.headers.get("content-encoding"))
    try:
        doc = orjson.loads(body)
    except orjson.JSONDecodeError as exc:
        raise BadRequest(f"body is not valid JSON ({exc}); send a GeoJSON FeatureCollection") from None
    result = await run_in_threadpool(registry.import_feature_collection, engine, doc)
    return Response(orjson.dumps(result), status_code=422 if result["errors"] else 200,
                    media_type="application/json")
