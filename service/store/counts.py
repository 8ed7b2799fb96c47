"""Count reads: one detector's stored counts a page at a time, and the recorded conflicts."""

from __future__ import annotations

from typing import Any

import orjson
from sqlalchemy import Engine, select

from service.errors import NotFound
from service.store import quality, tables
from service.store.engine import read_transaction
from service.timefmt import format_utc

ROWS_PER_FETCH = 2000  # rows pulled from the database cursor at a time


def counts_page_json(engine: Engine, detector_id: str, *, from_s: int | None,
                     until_s: int | None, limit: int, max_bytes: int) -> bytes:
    """A page of one detector's counts in time order, as the JSON of ``CountsPage``.

    Rows are encoded as they come off the cursor and the page stops at ``limit`` rows or
    ``max_bytes`` of row data, so a large read holds one page of JSON, not every row as
    objects; ``next_from`` then names the first start left out."""
    c, d = tables.counts, tables.detectors
    page = bytearray(b'{"detector_id":' + orjson.dumps(detector_id) + b',"data":[')
    data_start = len(page)
    rows = 0
    next_from: str | None = None
    with read_transaction(engine) as conn:
        if conn.execute(select(d.c.detector_id).where(d.c.detector_id == detector_id)).first() is None:
            raise NotFound(f"unknown detector {detector_id!r}")
        # Quality flags (service.store.quality): derived from evidence and alerts at read time.
        lookup = quality.flag_lookup(conn, detector_id, from_s=from_s or 0,
                                     until_s=until_s if until_s is not None else 1 << 62)
        q = select(c.c.start_s, c.c.count).where(c.c.detector_id == detector_id)
        if from_s is not None:
            q = q.where(c.c.start_s >= from_s)
        if until_s is not None:
            q = q.where(c.c.start_s < until_s)
        result = conn.execution_options(yield_per=ROWS_PER_FETCH).execute(
            q.order_by(c.c.start_s).limit(limit + 1))
        try:
            for start_s, count in result:
                piece = b'{"start":"%s","count":%d,"flag":"%s"},' % (
                    format_utc(start_s).encode(), count, lookup.flag(start_s).encode())
                if rows == limit or (rows and len(page) - data_start + len(piece) > max_bytes):
                    next_from = format_utc(start_s)
                    break
                page += piece
                rows += 1
        finally:
            result.close()
    if rows:
        del page[-1]  # the last row's comma
    page += b'],"next_from":' + orjson.dumps(next_from) + b"}"
    return bytes(page)


def conflicts_page(engine: Engine, *, detector_id: str | None, after: int, limit: int
                   ) -> dict[str, Any]:
    """Recorded conflicts (offered values that differed from stored ones) after a conflict id."""
    k = tables.count_conflicts
    q = select(k).where(k.c.conflict_id > after).order_by(k.c.conflict_id).limit(limit)
    if detector_id is not None:
        q = q.where(k.c.detector_id == detector_id)
    with read_transaction(engine) as conn:
        rows = conn.execute(q).all()
    data = [{"id": r.conflict_id, "detector_id": r.detector_id, "start": format_utc(r.start_s),
             "stored": r.stored_count, "offered": r.offered_count,
             "received": format_utc(r.received_s)} for r in rows]
    return {"data": data, "next_after": data[-1]["id"] if data else after}
