"""Validation and bulk storage of a batch of interval counts (no web imports).

A batch is stored in one write transaction with one multi-row
``INSERT ... ON CONFLICT DO NOTHING``. Each item ends in exactly one of:

- ``accepted``  — stored now;
- ``duplicate`` — the same detector, interval and value is already stored (success);
- ``conflict``  — a *different* value is already stored for that interval: the stored
  value is kept and the offered one is recorded in ``count_conflicts`` (listed by
  ``GET /v1/counts/conflicts``), never dropped silently;
- ``rejected``  — the item can never be stored as sent (unknown detector, misaligned,
  malformed, out of range, too far in the future), with a message saying why.
"""

from __future__ import annotations

import csv
import io
import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import orjson
from sqlalchemy import Connection, Engine, select
from sqlalchemy.exc import DBAPIError, OperationalError

from . import models
from .db import write_transaction
from .errors import BadRequest, PayloadTooLarge, Unavailable, ValidationFailed
from .timefmt import LocalOffsets, format_utc, parse_rfc3339

MAX_COUNT = 1_000_000  # no detector interval can hold a million vehicles; larger is a data error
CSV_HEADER = ("detector_id", "start", "count")


# One offered item: (index in the batch, detector_id, start text, count) as sent.
RawItem = tuple[int, Any, Any, Any]


@dataclass
class BatchResult:
    accepted: int = 0
    duplicate: int = 0
    conflicts: list[dict[str, Any]] = field(default_factory=list)
    rejected: list[dict[str, Any]] = field(default_factory=list)
    # detector_id -> earliest start_s stored now (drives scoring of new data)
    stored_from: dict[str, int] = field(default_factory=dict)

    @property
    def status_code(self) -> int:
        """200: all stored or identical duplicates. 422: some items can never succeed.
        409: nothing rejected, but some offered values differ from stored ones."""
        if self.rejected:
            return 422
        if self.conflicts:
            return 409
        return 200

    def to_dict(self) -> dict[str, Any]:
        return {
            "message": self.message,
            "accepted": self.accepted,
            "duplicate": self.duplicate,
            "conflict": len(self.conflicts),
            "rejected": len(self.rejected),
            "conflicts": self.conflicts,
            "errors": self.rejected,
        }

    @property
    def message(self) -> str:
        text = (f"{self.accepted} stored, {self.duplicate} already stored, "
                f"{len(self.conflicts)} conflicting, {len(self.rejected)} rejected")
        if self.rejected:
            text += "; the rejected items can never be stored as sent: see errors (do not resend)"
        elif self.conflicts:
            text += "; stored values were kept and the offered ones recorded: see conflicts"
        return text

    def merge(self, other: BatchResult, *, index_offset: int = 0) -> None:
        self.accepted += other.accepted
        self.duplicate += other.duplicate
        for c in other.conflicts:
            self.conflicts.append({**c, "index": c["index"] + index_offset})
        for r in other.rejected:
            self.rejected.append({**r, "index": r["index"] + index_offset})
        for det, s in other.stored_from.items():
            self.stored_from[det] = min(s, self.stored_from.get(det, s))


# ---------------------------------------------------------------------------- parsing


def parse_json_batch(body: bytes, *, max_items: int) -> list[RawItem]:
    """Items of a JSON body ``{"counts": [{"detector_id", "start", "count"}, ...]}``."""
    if not body.strip():
        raise BadRequest('empty body; send {"counts": [{"detector_id": ..., "start": ..., '
                         '"count": ...}]} as JSON or detector_id,start,count as text/csv')
    try:
        doc = orjson.loads(body)
    except orjson.JSONDecodeError as exc:
        raise BadRequest(f"body is not valid JSON ({exc}); send "
                         '{"counts": [{"detector_id": ..., "start": ..., "count": ...}]}') from None
    if isinstance(doc, list):
        items = doc
    elif isinstance(doc, dict) and "counts" in doc:
        items = doc["counts"]
    else:
        raise BadRequest('JSON body must be an object with a "counts" list, e.g. '
                         '{"counts": [{"detector_id": "D1", "start": "2026-11-16T08:15:00-06:00", '
                         '"count": 42}]}')
    if not isinstance(items, list):
        raise BadRequest(f'"counts" must be a list of items, got {type(items).__name__}')
    _check_size(len(items), max_items)
    # Plain tuples (index, detector_id, start, count): this is the hot path.
    return [(i, item.get("detector_id"), item.get("start"), item.get("count", _MISSING))
            if type(item) is dict else (i, None, None, _NotAnObject(type(item).__name__))
            for i, item in enumerate(items)]


def parse_csv_batch(body: bytes, *, max_items: int) -> list[RawItem]:
    """Items of a CSV body with header ``detector_id,start,count`` (BOM and CRLF accepted)."""
    try:
        text = body.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise BadRequest(f"CSV body is not UTF-8 ({exc})") from None
    if not text.strip():
        raise BadRequest("empty CSV body; the first line must be the header detector_id,start,count")
    reader = csv.reader(io.StringIO(text, newline=""))
    header = next(reader)
    names = [h.strip().lower() for h in header]
    missing = [c for c in CSV_HEADER if c not in names]
    if missing:
        raise BadRequest(f"CSV header {','.join(header)!r} lacks column(s) {', '.join(missing)}; "
                         "the header must name detector_id,start,count")
    col = {c: names.index(c) for c in CSV_HEADER}
    width = max(col.values()) + 1
    out = []
    for i, row in enumerate(reader):
        if not row or (len(row) == 1 and not row[0].strip()):
            continue
        if len(row) < width:
            out.append((len(out), row[0] if row else None, None, _ShortRow(i + 2, len(row))))
            continue
        text = row[col["count"]].strip()
        out.append((len(out), row[col["detector_id"]].strip(), row[col["start"]].strip(),
                    int(text) if text.isdigit() and text.isascii() else _CsvCount(text)))
        if len(out) > max_items:
            break
    _check_size(len(out), max_items)
    return out


def _check_size(n: int, max_items: int) -> None:
    if n == 0:
        raise ValidationFailed("the batch has no items; send at least one count")
    if n > max_items:
        raise PayloadTooLarge(f"the batch has more than {max_items:,} items; split it into batches "
                              f"of at most {max_items:,}", detail={"max_items": max_items})


class _Missing:
    pass


_MISSING = _Missing()


@dataclass(frozen=True)
class _NotAnObject:
    type_name: str


@dataclass(frozen=True)
class _ShortRow:
    line: int
    fields: int


@dataclass(frozen=True)
class _CsvCount:
    text: str


# ---------------------------------------------------------------------------- validation


class DetectorGrid(NamedTuple):
    interval_s: int
    timezone: str


def _count_error(raw: Any) -> tuple[int | None, str | None]:
    if isinstance(raw, _CsvCount):
        text = raw.text
        if not text or not (text.isdigit() or (text[0] == "-" and text[1:].isdigit())):
            return None, f"count {text!r} is not a whole number; counts are integers 0..{MAX_COUNT:,}"
        raw = int(text)
    elif isinstance(raw, _Missing):
        return None, "count is missing; each item needs detector_id, start and count"
    elif isinstance(raw, bool) or not isinstance(raw, int):
        shown = orjson.dumps(raw).decode() if raw is None or isinstance(raw, (str, float, bool)) \
            else type(raw).__name__
        return None, (f"count {shown} is not an integer; counts are JSON integers 0..{MAX_COUNT:,} "
                      "(not strings, not decimals)")
    if raw < 0:
        return None, f"count {raw} is negative; counts are integers 0..{MAX_COUNT:,}"
    if raw > MAX_COUNT:
        return None, f"count {raw} is larger than {MAX_COUNT:,}, which no detector interval can hold"
    return raw, None


def validate_items(
    items: Sequence[RawItem],
    grids: dict[str, DetectorGrid],
    *,
    now_s: float,
    future_tolerance_s: int,
) -> tuple[list[tuple[int, str, int, int]], list[dict[str, Any]]]:
    """Split raw items into valid ``(index, detector_id, start_s, count)`` and rejections."""
    valid: list[tuple[int, str, int, int]] = []
    rejected: list[dict[str, Any]] = []
    parsed_starts: dict[Any, int | str] = {}
    offsets = LocalOffsets()
    latest_ok = now_s + future_tolerance_s

    def reject(item: RawItem, message: str) -> None:
        rejected.append({
            "index": item[0],
            "detector_id": item[1] if isinstance(item[1], str) else None,
            "start": item[2] if isinstance(item[2], str) else None,
            "error": message,
        })

    aligned: dict[tuple[DetectorGrid, int], int] = {}
    for item in items:
        index, det, start_text, count = item
        grid = grids.get(det) if type(det) is str else None
        start = parsed_starts.get(start_text) if type(start_text) is str else None
        if (grid is not None and type(start) is int and type(count) is int
                and 0 <= count <= MAX_COUNT and start <= latest_ok):
            misaligned = aligned.get((grid, start))
            if misaligned is None:
                local = start + offsets.offset(grid.timezone, start)
                misaligned = aligned[(grid, start)] = local % grid.interval_s
            if not misaligned:
                valid.append((index, det, start, count))
                continue
        # Slow path: work out exactly what is wrong (or parse a new timestamp).
        if isinstance(count, _NotAnObject):
            reject(item, f"item is a JSON {count.type_name}, not an object with "
                         "detector_id, start and count")
            continue
        if isinstance(count, _ShortRow):
            reject(item, f"CSV line {count.line} has {count.fields} field(s); "
                         "expected detector_id,start,count")
            continue
        if not isinstance(det, str) or not det:
            reject(item, "detector_id is missing or not a string")
            continue
        if grid is None:
            reject(item, f"unknown detector {det!r}; register it with PUT /v1/detectors/{{id}} first")
            continue
        if not isinstance(start_text, str):
            reject(item, "start is missing or not a string; use an RFC 3339 timestamp with offset, "
                         "e.g. 2026-11-16T08:15:00-06:00")
            continue
        if start is None:
            try:
                start = parse_rfc3339(start_text)
            except ValueError as exc:
                start = str(exc)
            parsed_starts[start_text] = start
        if isinstance(start, str):
            reject(item, start)
            continue
        value, problem = _count_error(count)
        if problem is not None:
            reject(item, problem)
            continue
        if start > latest_ok:
            reject(item, f"start {start_text} is more than {future_tolerance_s} s ahead of the "
                         "server clock; check the controller's clock")
            continue
        local = start + offsets.offset(grid.timezone, start)
        if local % grid.interval_s:
            reject(item, f"start {start_text} is not on detector {det}'s {grid.interval_s}-second "
                         f"interval grid (local time {local % 86400 // 3600:02d}:"
                         f"{local % 3600 // 60:02d}:{local % 60:02d} is "
                         f"{local % grid.interval_s} s past an interval start)")
            continue
        valid.append((index, det, start, value))  # type: ignore[arg-type]
    return valid, rejected


# ---------------------------------------------------------------------------- storage


def load_grids(conn: Connection, detector_ids: Iterable[str]) -> dict[str, DetectorGrid]:
    ids = sorted({d for d in detector_ids if isinstance(d, str)})
    grids: dict[str, DetectorGrid] = {}
    d = models.detectors
    for i in range(0, len(ids), 500):
        chunk = ids[i : i + 500]
        for row in conn.execute(
            select(d.c.detector_id, d.c.interval_s, d.c.timezone).where(d.c.detector_id.in_(chunk))
        ):
            grids[row.detector_id] = DetectorGrid(row.interval_s, row.timezone)
    return grids


def _insert_sql(dialect: str) -> str:
    if dialect == "sqlite":
        return ("INSERT INTO counts (detector_id, start_s, count, received_s) VALUES (?, ?, ?, ?) "
                "ON CONFLICT (detector_id, start_s) DO NOTHING")
    return ("INSERT INTO counts (detector_id, start_s, count, received_s) VALUES (%s, %s, %s, %s) "
            "ON CONFLICT (detector_id, start_s) DO NOTHING")


def _stored_values(conn: Connection, keys: Iterable[tuple[str, int]]) -> dict[tuple[str, int], int]:
    by_det: dict[str, list[int]] = {}
    for det, start in keys:
        by_det.setdefault(det, []).append(start)
    c = models.counts
    found: dict[tuple[str, int], int] = {}
    for det, starts in by_det.items():
        for i in range(0, len(starts), 900):
            chunk = starts[i : i + 900]
            for row in conn.execute(
                select(c.c.start_s, c.c.count).where(c.c.detector_id == det, c.c.start_s.in_(chunk))
            ):
                found[(det, row.start_s)] = row.count
    return found


def store_valid(conn: Connection, valid: list[tuple[int, str, int, int]], *, now_s: float,
                result: BatchResult) -> None:
    """Insert the valid items of one batch inside the caller's write transaction."""
    first: dict[tuple[str, int], tuple[int, int]] = {}
    repeats: list[tuple[int, str, int, int]] = []
    rows: list[tuple[str, int, int, float]] = []
    for index, det, start, count in valid:
        key = (det, start)
        if key in first:
            repeats.append((index, det, start, count))
            continue
        first[key] = (index, count)
        rows.append((det, start, count, now_s))
    inserted = 0
    if rows:
        cur = conn.exec_driver_sql(_insert_sql(conn.dialect.name), rows)
        inserted = cur.rowcount if cur.rowcount is not None and cur.rowcount >= 0 else -1
    if inserted == len(rows) and not repeats:
        result.accepted += inserted
        for det, start, _, _ in rows:
            if start < result.stored_from.get(det, start + 1):
                result.stored_from[det] = start
        return
    # Slow path: something was already stored (resend, conflict or in-batch repeat).
    stored = _stored_values(conn, first.keys())
    conflicts_to_record: list[dict[str, Any]] = []
    not_inserted_same = 0
    conflict_keys: set[tuple[str, int]] = set()
    for key, (index, count) in first.items():
        have = stored.get(key)
        if have is not None and have != count:
            conflict_keys.add(key)
            result.conflicts.append(_conflict(index, key, have, count))
            conflicts_to_record.append(_conflict_row(key, have, count, now_s))
    if inserted < 0:  # driver without rowcount: treat equal values as duplicates
        inserted = 0
        not_inserted_same = len(first) - len(conflict_keys)
    else:
        not_inserted_same = len(first) - len(conflict_keys) - inserted
    result.accepted += inserted
    result.duplicate += not_inserted_same
    for index, det, start, count in repeats:
        have = stored.get((det, start), first[(det, start)][1])
        if have == count:
            result.duplicate += 1
        else:
            result.conflicts.append(_conflict(index, (det, start), have, count))
            conflicts_to_record.append(_conflict_row((det, start), have, count, now_s))
    for det, start in first:
        if (det, start) not in conflict_keys and start < result.stored_from.get(det, start + 1):
            result.stored_from[det] = start
    if conflicts_to_record:
        conn.execute(models.count_conflicts.insert(), conflicts_to_record)
    result.conflicts.sort(key=lambda c: c["index"])


def _conflict(index: int, key: tuple[str, int], stored: int, offered: int) -> dict[str, Any]:
    return {"index": index, "detector_id": key[0], "start": format_utc(key[1]),
            "stored": stored, "offered": offered,
            "resolution": "kept the stored value; the offered value is recorded as a conflict"}


def _conflict_row(key: tuple[str, int], stored: int, offered: int, now_s: float) -> dict[str, Any]:
    return {"detector_id": key[0], "start_s": key[1], "stored_count": stored,
            "offered_count": offered, "received_s": now_s}


def ingest_items(engine: Engine, items: Sequence[RawItem], *, future_tolerance_s: int,
                 now_s: float | None = None, after_store=None) -> BatchResult:  # type: ignore[no-untyped-def]
    """Validate and store one batch atomically. ``after_store(conn, result)`` runs inside the
    same transaction (used to queue scoring). Raises ``Unavailable`` when nothing was stored."""
    now = time.time() if now_s is None else now_s
    result = BatchResult()
    try:
        with write_transaction(engine) as conn:
            grids = load_grids(conn, (it[1] for it in items))
            valid, rejected = validate_items(items, grids, now_s=now,
                                             future_tolerance_s=future_tolerance_s)
            result.rejected = rejected
            store_valid(conn, valid, now_s=now, result=result)
            if after_store is not None:
                after_store(conn, result)
    except (OperationalError, DBAPIError) as exc:
        if isinstance(exc, OperationalError) or getattr(exc, "connection_invalidated", False):
            raise Unavailable(f"the database could not store the batch ({type(exc.orig).__name__}); "
                              "nothing was stored: resend the same batch") from exc
        raise
    return result
