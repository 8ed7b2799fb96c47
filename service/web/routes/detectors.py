"""Detector registry routes."""

from __future__ import annotations

from typing import Annotated, Any

import orjson
from fastapi import APIRouter, Path, Query, Request, Response
from fastapi.concurrency import run_in_threadpool
from pydantic import AfterValidator

from service.domain import DETECTOR_ID_PATTERN, plain_text
from service.errors import BadRequest
from service.pipeline import ingest
from service.store import detectors as registry
from service.store.engine import write_transaction
from service.web.deps import AdminDep, EngineDep, ReadDep
from service.web.openapi import IMPORT_BODY
from service.web.schemas import (
    DetectorCreate,
    DetectorImportResult,
    DetectorPublic,
    DetectorsPublic,
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
