"""Count ingestion and count reads."""

from __future__ import annotations

from typing import Annotated, Any

import orjson
from fastapi import APIRouter, Query, Request, Response
from fastapi.concurrency import run_in_threadpool
from pydantic import AfterValidator

from service.domain import INT32_MAX, plain_text
from service.errors import UnsupportedMediaType, ValidationFailed
from service.pipeline import ingest
from service.store import counts as count_store
from service.timefmt import START_WINDOW_TEXT, format_utc, parse_rfc3339
from service.web import metrics, paging
from service.web.deps import EngineDep, IngestDep, ReadDep, SettingsDep
from service.web.openapi import COUNTS_BODY, CountBatchResult
from service.web.schemas import ConflictsPage, CountsPage

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


@router.post("", response_model=CountBatchResult, description=BATCH_DOC, summary="Store a batch of interval counts",
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
    metrics.observe_batch(request.app, result)
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


DetectorFilter = Annotated[str | None, Query(max_length=64, description="Only this detector."),
                           AfterValidator(plain_text)]
GroupFilter = Annotated[str | None, Query(max_length=64, description="Only the detectors of "
                                                                     "this group."),
                        AfterValidator(plain_text)]
CSV_CONTENT = {200: {"content": {"text/csv": {"schema": {"type": "string"}}},
                     "description": "JSON (CountsPage), or CSV `detector_id,start,count,flag` when "
                                    "asked with `Accept: text/csv` (the cursor to the rest is in "
                                    "the `Tallyward-Next-Cursor` and `Link` headers)."}}


@router.get("", response_model=CountsPage, responses=CSV_CONTENT)
def get_counts(request: Request, engine: EngineDep, settings: SettingsDep, _: ReadDep,
               detector_id: DetectorFilter = None, group: GroupFilter = None,
               from_: str | None = Query(None, alias="from", description="RFC 3339, inclusive."),
               until: str | None = Query(None, description="RFC 3339, exclusive."),
               limit: int = Query(10_000, ge=1, le=100_000, description="Most rows in this page."),
               cursor: str | None = Query(None, max_length=paging.MAX_CURSOR_CHARS,
                                          description="`next` of the previous page, with the "
                                                      "same filters."),
               ) -> Response:
    """Stored counts by detector, then time, a page at a time (JSON, or CSV with Accept:
    text/csv). When more rows remain (past `limit`, or past the service's page size in bytes)
    `next` is a cursor: ask again with the same filters and `cursor=<next>`; it is null when
    the page reaches the end. Filters: `detector_id`, `group`, `from`/`until`."""
    lo, hi = _time_param(from_, "from"), _time_param(until, "until")
    query = {"detector_id": detector_id, "group": group, "from": lo, "until": hi}
    after = None
    if cursor is not None:
        position = paging.decode_cursor(settings, cursor, query=query)
        if (len(position) != 2 or not isinstance(position[0], str)
                or type(position[1]) is not int):
            raise ValidationFailed("cursor is not one this service issued; pass the `next` "
                                   "value of the previous page unchanged")
        after = (position[0], position[1])
    as_csv = paging.wants_csv(request)
    page = count_store.counts_page(
        engine, detector_id=detector_id, group=group, from_s=lo, until_s=hi, after=after,
        limit=limit, max_bytes=settings.max_page_bytes,
        encode=count_store.csv_row if as_csv else count_store.json_row)
    next_cursor = None
    if page.next_position is not None:
        next_cursor = paging.encode_cursor(settings, query=query,
                                           position=list(page.next_position))
    if as_csv:
        headers = {}
        if next_cursor is not None:
            rest = request.url.include_query_params(cursor=next_cursor)
            headers = {"Tallyward-Next-Cursor": next_cursor,
                       "Link": f'<{rest.path}?{rest.query}>; rel="next"'}
        return paging.csv_response(b"detector_id,start,count,flag\r\n" + page.rows,
                                   filename="counts.csv", headers=headers)
    next_from = None
    if detector_id is not None and page.next_position is not None:
        next_from = format_utc(page.next_position[1])
    body = bytearray(b'{"detector_id":' + orjson.dumps(detector_id) + b',"group":'
                     + orjson.dumps(group) + b',"data":[')
    body += page.rows[:-1] if page.n else b""  # the last row's comma
    body += (b'],"next":' + orjson.dumps(next_cursor) + b',"next_from":'
             + orjson.dumps(next_from) + b"}")
    return Response(bytes(body), media_type="application/json")  # the shape is CountsPage


@router.get("/conflicts", response_model=ConflictsPage)
def get_conflicts(engine: EngineDep, _: ReadDep, detector_id: DetectorFilter = None,
                  after: int = Query(0, ge=0, le=INT32_MAX,
                                     description="Page after this conflict id."),
                  limit: int = Query(1000, ge=1, le=10_000)) -> dict[str, Any]:
    """Offered values that differed from stored ones (the stored value was kept)."""
    return count_store.conflicts_page(engine, detector_id=detector_id, after=after, limit=limit)
