"""Count ingestion and count reads."""

from __future__ import annotations

from typing import Any

import orjson
from fastapi import APIRouter, Query, Request, Response
from fastapi.concurrency import run_in_threadpool
from sqlalchemy import select

from .. import ingest, models
from ..db import read_transaction
from ..deps import EngineDep, IngestDep, ReadDep, SettingsDep
from ..errors import NotFound, UnsupportedMediaType, ValidationFailed
from ..openapi import COUNTS_BODY
from ..timefmt import format_utc, parse_rfc3339

router = APIRouter(prefix="/v1/counts", tags=["counts"])


BATCH_DOC = """Store a batch of interval counts (JSON or CSV).

Status: 200 every item stored or an identical duplicate; 409 nothing rejected but some
offered values differ from stored ones (kept, listed in `conflicts`); 422 some items can
never be stored as sent (listed in `errors`; the valid ones are stored); 413 batch too
large; 503 nothing was stored, resend the same batch after Retry-After."""


@router.post("", description=BATCH_DOC, summary="Store a batch of interval counts",
             openapi_extra=COUNTS_BODY)
async def post_counts(request: Request, engine: EngineDep, settings: SettingsDep,
                      _: IngestDep) -> Response:
    body = await request.body()
    content_type = request.headers.get("content-type", "application/json").split(";")[0].strip()
    if content_type in ("application/json", ""):
        items = ingest.parse_json_batch(body, max_items=settings.max_batch_items)
    elif content_type in ("text/csv", "application/csv"):
        items = ingest.parse_csv_batch(body, max_items=settings.max_batch_items)
    else:
        raise UnsupportedMediaType(f"Content-Type {content_type!r} is not accepted; send "
                                   "application/json or text/csv")
    after_store = getattr(request.app.state, "after_store", None)
    result = await run_in_threadpool(
        ingest.ingest_items, engine, items, future_tolerance_s=settings.future_tolerance_s,
        after_store=after_store)
    hook = getattr(request.app.state, "after_commit", None)
    if hook is not None and result.stored_from:
        await run_in_threadpool(hook, result)
    return Response(orjson.dumps(result.to_dict()), status_code=result.status_code,
                    media_type="application/json")


def _time_param(value: str | None, name: str) -> int | None:
    if value is None:
        return None
    try:
        return parse_rfc3339(value)
    except ValueError as exc:
        raise ValidationFailed(f"{name}: {exc}") from None


@router.get("")
def get_counts(engine: EngineDep, _: ReadDep, detector_id: str,
               from_: str | None = Query(None, alias="from", description="RFC 3339, inclusive."),
               until: str | None = Query(None, description="RFC 3339, exclusive."),
               limit: int = Query(10_000, ge=1, le=100_000)) -> dict[str, Any]:
    """Stored counts of one detector in time order."""
    lo, hi = _time_param(from_, "from"), _time_param(until, "until")
    c, d = models.counts, models.detectors
    with read_transaction(engine) as conn:
        if conn.execute(select(d.c.detector_id).where(d.c.detector_id == detector_id)).first() is None:
            raise NotFound(f"unknown detector {detector_id!r}")
        q = select(c.c.start_s, c.c.count).where(c.c.detector_id == detector_id)
        if lo is not None:
            q = q.where(c.c.start_s >= lo)
        if hi is not None:
            q = q.where(c.c.start_s < hi)
        rows = conn.execute(q.order_by(c.c.start_s).limit(limit)).all()
    return {"detector_id": detector_id,
            "data": [{"start": format_utc(r.start_s), "count": r.count} for r in rows]}


@router.get("/conflicts")
def get_conflicts(engine: EngineDep, _: ReadDep, detector_id: str | None = None,
                  after: int = Query(0, ge=0, description="Page after this conflict id."),
                  limit: int = Query(1000, ge=1, le=10_000)) -> dict[str, Any]:
    """Offered values that differed from stored ones (the stored value was kept)."""
    k = models.count_conflicts
    q = select(k).where(k.c.conflict_id > after).order_by(k.c.conflict_id).limit(limit)
    if detector_id is not None:
        q = q.where(k.c.detector_id == detector_id)
    with read_transaction(engine) as conn:
        rows = conn.execute(q).all()
    data = [{"id": r.conflict_id, "detector_id": r.detector_id, "start": format_utc(r.start_s),
             "stored": r.stored_count, "offered": r.offered_count,
             "received": format_utc(r.received_s)} for r in rows]
    return {"data": data, "next_after": data[-1]["id"] if data else after}
