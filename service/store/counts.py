"""Count reads: stored counts a page at a time (by detector, group, time range), and the
recorded conflicts."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import orjson
from sqlalchemy import Engine, and_, or_, select

from service.errors import NotFound
from service.store import quality, tables
from service.store.engine import read_transaction
from service.timefmt import format_utc

ROWS_PER_FETCH = 2000  # rows pulled from the database cursor at a time


@dataclass
class CountsPage:
    """One page of counts: the encoded rows, how many, and where the next page starts
    (``(detector_id, start_s)`` of the first row left out; None at the end)."""

    rows: bytes
    n: int
    next_position: tuple[str, int] | None


def counts_page(engine: Engine, *, detector_id: str | None, group: str | None,
                from_s: int | None, until_s: int | None, after: tuple[str, int] | None,
                limit: int, max_bytes: int, encode: Callable[[str, int, int, str], bytes]
                ) -> CountsPage:
    """A page of stored counts ordered by detector, then interval start.

    Filters: one detector, or the detectors of a group, or every detector; starts in
    ``[from_s, until_s)``; and from ``after`` on (inclusive: the position a previous page
    left off at). Rows are encoded by ``encode(detector_id, start_s, count, flag)`` (the quality
    flag of :mod:`service.store.quality`, derived from evidence and alerts) as they come off
    the cursor, and the page stops at ``limit`` rows or ``max_bytes`` of encoded rows, so a
    large read holds one page of text, not every row as objects."""
    c, d = tables.counts, tables.detectors
    page = bytearray()
    rows = 0
    next_position: tuple[str, int] | None = None
    with read_transaction(engine) as conn:
        q = select(c.c.detector_id, c.c.start_s, c.c.count)
        if detector_id is not None:
            found = select(d.c.detector_id).where(d.c.detector_id == detector_id)
            if conn.execute(found).first() is None:
                raise NotFound(f"unknown detector {detector_id!r}")
            q = q.where(c.c.detector_id == detector_id)
        if group is not None:
            members = select(d.c.detector_id).where(d.c.group_id == group)
            if conn.execute(members.limit(1)).first() is None:
                raise NotFound(f"unknown group {group!r}: no detector belongs to it")
            q = q.where(c.c.detector_id.in_(members))
        if from_s is not None:
            q = q.where(c.c.start_s >= from_s)
        if until_s is not None:
            q = q.where(c.c.start_s < until_s)
        if after is not None:
            q = q.where(or_(c.c.detector_id > after[0],
                            and_(c.c.detector_id == after[0], c.c.start_s >= after[1])))
        result = conn.execution_options(yield_per=ROWS_PER_FETCH).execute(
            q.order_by(c.c.detector_id, c.c.start_s).limit(limit + 1))
        try:
            lookups: dict[str, quality.FlagLookup] = {}
            for det, start_s, count in result:
                lookup = lookups.get(det)
                if lookup is None:  # rows come by detector: one look-up per detector of the page
                    lookup = lookups[det] = quality.flag_lookup(
                        conn, det, from_s=from_s or 0,
                        until_s=until_s if until_s is not None else 1 << 62)
                piece = encode(det, start_s, count, lookup.flag(int(start_s)))
                if rows == limit or (rows and len(page) + len(piece) > max_bytes):
                    next_position = (det, int(start_s))
                    break
                page += piece
                rows += 1
        finally:
            result.close()
    return CountsPage(bytes(page), rows, next_position)


def json_row(detector_id: str, start_s: int, count: int, flag: str) -> bytes:
    """One count as the JSON object of ``CountPublic``, with a trailing comma."""
    return b'{"detector_id":%s,"start":"%s","count":%d,"flag":"%s"},' % (
        orjson.dumps(detector_id), format_utc(start_s).encode(), count, flag.encode())


def csv_row(detector_id: str, start_s: int, count: int, flag: str) -> bytes:
    """One count as an RFC 4180 CSV line (ids and flags hold no comma, quote or formula
    character)."""
    return b"%s,%s,%d,%s\r\n" % (detector_id.encode(), format_utc(start_s).encode(), count,
                                  flag.encode())


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
