"""Count corrections: an admin replaces a stored count with a reason; the trail is listed."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Query
from pydantic import AfterValidator

from service.domain import INT32_MAX, plain_text
from service.errors import ValidationFailed
from service.store import corrections as store
from service.timefmt import parse_interval_start
from service.web.deps import AdminDep, EngineDep, ReadDep
from service.web.schemas import CorrectionPublic, CorrectionRequest, CorrectionsPage

router = APIRouter(prefix="/v1/counts/corrections", tags=["counts"])

CORRECT_DOC = """Replace a stored count (typically accepting a recorded conflict's offered
value: give `conflict_id`) with a `reason`. The old and new values, the key's name and the
time are kept and listed; the detector is rescored from that interval. Admin keys only.
404: unknown detector or conflict, or no count stored at that interval; 422: negative count,
the same value as stored, or neither a conflict nor detector, start and count."""


@router.post("", response_model=CorrectionPublic, status_code=201, description=CORRECT_DOC,
             summary="Correct a stored count")
def correct(body: CorrectionRequest, engine: EngineDep, principal: AdminDep) -> dict[str, Any]:
    start_s = None
    if body.start is not None:
        try:
            start_s = parse_interval_start(body.start)
        except ValueError as exc:
            raise ValidationFailed(str(exc)) from None
    return store.correct_count(engine, detector_id=body.detector_id, start_s=start_s,
                               count=body.count, reason=body.reason, by=principal.name,
                               conflict_id=body.conflict_id)


@router.get("", response_model=CorrectionsPage)
def list_corrections(
    engine: EngineDep, _: ReadDep,
    detector_id: Annotated[str | None, Query(max_length=64, description="Only this detector."),
                           AfterValidator(plain_text)] = None,
    after: Annotated[int, Query(ge=0, le=INT32_MAX,
                                description="Corrections after this id.")] = 0,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
) -> dict[str, Any]:
    """Corrections of stored counts, oldest first: old and new value, reason, who and when."""
    return store.corrections_page(engine, detector_id=detector_id, after=after, limit=limit)
