"""Count ingestion and count reads."""

from __future__ import annotations

from typing import Annotated, Any

import orjson
from fastapi import APIRouter, Query, Request, Response
from fastapi.concurrency import run_in_threadpool
from pydantic import AfterValidator
from sqlalchemy import select

from service.domain import INT32_MAX, plain_text
from service.errors import NotFound, UnsupportedMediaType, ValidationFailed
from service.pipeline import ingest
from service.store import tables as models
from service.store.engine import read_transaction
from service.timefmt import START_WINDOW_TEXT, format_utc, parse_rfc3339
from service.web.deps import EngineDep, IngestDep, ReadDep, SettingsDep
from service.web.openapi import COUNTS_BODY

router = APIRouter(prefix="/v1/counts", tags=["counts"])


BATCH_DOC = f"""Store a batch of interval counts (JSON or CSV).

Status: 200 every item stored or an identical duplicate; 409 nothing rejected but some
offered values differ from stored ones (kept, listed in `conflicts`); 422 some items can
never be stored as sent (listed in `errors`; the valid ones are stored); 413 batch too
large; 415 neither JSON nor CSV, or compressed (gzip is not accepted); 503 nothing was
stored, resend the same batch after Retry-After. Counts are whole numbers
0..{ingest.MAX_COUNT:,}; starts are RFC 3339 with an offset, from {START_WINDOW_TEXT};
CSV lines are at most {ingest.MAX_CSV_LINE_CHARS:,} characters and a rejected CSV item
also names its `line`."""


@router.post("", description=BATCH_DOC, summary="Store a batch of interval counts",
             openapi_extra=COUNTS_BODY)
async def post_counts(request: Request, engine: EngineDep, settings: SettingsDep,
                      _: IngestDep) -> Response:
    body = await request.body()
    ingest.refuse_compressed(body, request.headers.get("content-encoding"))
    # Media types are case-insensitive (RFC 9110 section 8.3.1).
    content_type = request.headers.get("content-type", "application/json").split(";")[0]
    content_type = content_type.strip().lower()
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


DetectorQuery = Annotated[str, Query(min_length=1, max_length=64, description="Detector id."),
                          AfterValidator(plain_text)]
DetectorFilter = Annotated[str | None, Query(max_length=64, description="Only this detector."),
                           AfterValidator(plain_text)]
ROWS_PER_FETCH = 2000  # rows pulled from the database cursor at a time


@router.get("")
def get_counts(engine: EngineDep, settings: SettingsDep, _: ReadDep, detector_id: DetectorQuery,
               from_: str | None = Query(None, alias="from", description="RFC 3339, inclusive."),
               until: str | None = Query(None, description="RFC 3339, exclusive."),
               limit: int = Query(10_000, ge=1, le=100_000, description="Most rows in this page."),
               ) -> Response:
    """Stored counts of one detector in time order, a page at a time: when more rows remain
    (past `limit`, or past the service's page size in bytes) `next_from` is the start to
    ask for next (as `from`); it is null when the page reaches the end."""
    lo, hi = _time_param(from_, "from"), _time_param(until, "until")
    c, d = models.counts, models.detectors
    budget = settings.max_page_bytes
    # Rows are encoded as they come off the cursor and the page stops at `limit` rows or
    # the byte budget, so a large read holds one page of JSON, not every row as objects.
    page = bytearray(b'{"detector_id":' + orjson.dumps(detector_id) + b',"data":[')
    data_start = len(page)
    rows = 0
    next_from: str | None = None
    with read_transaction(engine) as conn:
        if conn.execute(select(d.c.detector_id).where(d.c.detector_id == detector_id)).first() is None:
            raise NotFound(f"unknown detector {detector_id!r}")
        q = select(c.c.start_s, c.c.count).where(c.c.detector_id == detector_id)
        if lo is not None:
            q = q.where(c.c.start_s >= lo)
        if hi is not None:
            q = q.where(c.c.start_s < hi)
        result = conn.execution_options(yield_per=ROWS_PER_FETCH).execute(
            q.order_by(c.c.start_s).limit(limit + 1))
        try:
            for start_s, count in result:
                piece = b'{"start":"%s","count":%d},' % (format_utc(start_s).encode(), count)
                if rows == limit or (rows and len(page) - data_start + len(piece) > budget):
                    next_from = format_utc(start_s)
                    break
                page += piece
                rows += 1
        finally:
            result.close()
    if rows:
        del page[-1]  # the last row's comma
    page += b'],"next_from":' + orjson.dumps(next_from) + b"}"
    return Response(bytes(page), media_type="application/json")


@router.get("/conflicts")
def get_conflicts(engine: EngineDep, _: ReadDep, detector_id: DetectorFilter = None,
                  after: int = Query(0, ge=0, le=INT32_MAX,
                                     description="Page after this conflict id."),
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
