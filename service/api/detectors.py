"""Detector registry routes."""

from __future__ import annotations

from typing import Annotated, Any

import orjson
from fastapi import APIRouter, Path, Query, Request, Response
from fastapi.concurrency import run_in_threadpool

from .. import registry
from ..db import write_transaction
from ..deps import AdminDep, EngineDep, ReadDep
from ..errors import BadRequest
from ..openapi import IMPORT_BODY
from ..schemas import (
    DETECTOR_ID_PATTERN,
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
def list_detectors(engine: EngineDep, _: ReadDep, group: str | None = None,
                   after: str | None = Query(None, description="Page after this detector id."),
                   limit: int = Query(1000, ge=1, le=10_000)) -> dict[str, Any]:
    """List detectors in id order."""
    data, total = registry.list_detectors(engine, group=group, limit=limit, after=after)
    return {"data": data, "count": total}


@router.get("/{detector_id}", response_model=DetectorPublic)
def get_detector(detector_id: DetectorId, engine: EngineDep, _: ReadDep) -> dict[str, Any]:
    """One detector."""
    return registry.get_detector(engine, detector_id)


import_router = APIRouter(prefix="/v1", tags=["detectors"])


@import_router.post("/detectors:import", response_model=DetectorImportResult,
                    openapi_extra=IMPORT_BODY)
async def import_detectors(request: Request, engine: EngineDep, _: AdminDep) -> dict[str, Any]:
    """Create or update detectors from a GeoJSON FeatureCollection."""
    body = await request.body()
    try:
        doc = orjson.loads(body)
    except orjson.JSONDecodeError as exc:
        raise BadRequest(f"body is not valid JSON ({exc}); send a GeoJSON FeatureCollection") from None
    return await run_in_threadpool(registry.import_feature_collection, engine, doc)
