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

Every value is checked against what the database accepts *before* the insert, so one bad
item costs only itself: counts are ASCII digits within 0..``MAX_COUNT`` (digit strings are
length-checked before ``int()``), starts lie in the window of ``timefmt.parse_interval_start``,
detector ids are well formed (no control characters reach the database), and CSV lines are
length-limited. Rows are written in (detector_id, start_s) order, so concurrent batches with
overlapping keys cannot deadlock.
"""

from __future__ import annotations

import csv
import io
import json
import re
import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import orjson
from sqlalchemy import Connection, Engine, select
from sqlalchemy.exc import DBAPIError, OperationalError

from service.domain import DETECTOR_ID_PATTERN, detector_id_error
from service.errors import (
    BadRequest,
    PayloadTooLarge,
    Unavailable,
    UnsupportedMediaType,
    ValidationFailed,
)
from service.store import tables as models
from service.store.engine import write_transaction
from service.timefmt import LocalOffsets, format_utc, parse_interval_start, shown

MAX_COUNT = 1_000_000  # no detector interval can hold a million vehicles; larger is a data error
MAX_COUNT_DIGITS = 20  # a longer digit string is refused before int() ever sees it
MAX_CSV_LINE_CHARS = 4096  # a counts line is ~100 characters; far longer is not a count
CSV_HEADER = ("detector_id", "start", "count")
_ID = re.compile(DETECTOR_ID_PATTERN)
_WHOLE_NUMBER = re.compile(r"-?[0-9]+", re.ASCII)


# One offered item: (index in the batch, detector_id, start text, count) as sent.
RawItem = tuple[int, Any, Any, Any]


class CsvBatch(list[RawItem]):
    """The items of a CSV body and, in ``lines``, the body line each came from."""

    def __init__(self) -> None:
        super().__init__()
        self.lines: list[int] = []


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
            text += ("; all valid items were stored; fix the rejected items listed in errors "
                     "and send only those")
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


def refuse_compressed(body: bytes, content_encoding: str | None) -> None:
    """Refuse a compressed body (by its Content-Encoding or the gzip magic bytes) with 415."""
    coding = (content_encoding or "").strip().lower()
    if coding not in ("", "identity"):
        raise UnsupportedMediaType(f"Content-Encoding {shown(coding)} is not accepted (gzip is not "
                                   "accepted); send the body uncompressed")
    if body[:2] == b"\x1f\x8b":
        raise UnsupportedMediaType("the body is gzip-compressed and gzip is not accepted; send it "
                                   "uncompressed as application/json or text/csv")


def parse_json_batch(body: bytes, *, max_items: int) -> list[RawItem]:
    """Items of a JSON body ``{"counts": [{"detector_id", "start", "count"}, ...]}``."""
    if not body.strip():
        raise BadRequest('empty body; send {"counts": [{"detector_id": ..., "start": ..., '
                         '"count": ...}]} as JSON or detector_id,start,count as text/csv')
    try:
        doc = orjson.loads(body)
    except orjson.JSONDecodeError as exc:
        doc = _lenient_json(body, exc)
    if isinstance(doc, list):
        items = doc
    elif isinstance(doc, dict) and "counts" in doc:
        if len(doc) > 1:
            extra = ", ".join(repr(k[:40]) for k in sorted(doc) if k != "counts")
            raise ValidationFailed(f"unknown field {extra} in the batch; the JSON body takes only "
                                   '"counts" (a list of {"detector_id", "start", "count"})')
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
            if type(item) is dict and item.keys() <= ITEM_FIELDS
            else (i, None, None, _not_an_item(item))
            for i, item in enumerate(items)]


def _not_an_item(item: Any) -> _NotAnObject | _UnknownFields:
    if type(item) is dict:
        return _UnknownFields(tuple(sorted(str(k)[:40] for k in item.keys() - ITEM_FIELDS)))
    return _NotAnObject(type(item).__name__)


def _lenient_json(body: bytes, error: orjson.JSONDecodeError) -> Any:
    """Second reading of a body orjson refused: well-formed JSON with an item orjson cannot hold
    (a number past 64 bits, a lone surrogate in a string) must cost that item, not the batch.
    Integers longer than ``MAX_COUNT_DIGITS`` digits become ``_LongNumber`` without int()."""
    def no_constant(name: str) -> Any:
        raise ValueError(f"{name} is not JSON")

    try:
        return json.loads(body.decode("utf-8"), parse_int=_json_int, parse_constant=no_constant)
    except (UnicodeDecodeError, ValueError, RecursionError):
        raise BadRequest(f"body is not valid JSON ({error}); send "
                         '{"counts": [{"detector_id": ..., "start": ..., "count": ...}]}') from None


def _json_int(text: str) -> int | _LongNumber:
    digits = len(text.lstrip("-"))
    return int(text) if digits <= MAX_COUNT_DIGITS else _LongNumber(digits)


def parse_csv_batch(body: bytes, *, max_items: int) -> CsvBatch:
    """Items of a CSV body with header ``detector_id,start,count`` (BOM and CRLF accepted).

    One record per line: a line over ``MAX_CSV_LINE_CHARS`` characters, with broken quoting
    or with too few fields becomes a rejected item naming its line, never a failed batch
    (and quoted fields cannot run across lines, so the csv module's field limit is never met).
    """
    try:
        text = body.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise BadRequest(f"CSV body is not UTF-8 ({exc})") from None
    if not text.strip():
        raise BadRequest("empty CSV body; the first line must be the header detector_id,start,count")
    lines = iter(io.StringIO(text, newline=""))
    header_line = next(lines).rstrip("\r\n")
    if len(header_line) > MAX_CSV_LINE_CHARS:
        raise BadRequest(f"the CSV header line is {len(header_line):,} characters long; it must be "
                         "detector_id,start,count")
    header = _csv_fields(header_line)
    if isinstance(header, str):
        raise BadRequest(f"the CSV header line is malformed ({header}); it must be "
                         "detector_id,start,count")
    names = [h.strip().lower() for h in header]
    missing = [c for c in CSV_HEADER if c not in names]
    if missing:
        raise BadRequest(f"CSV header {shown(','.join(header), 200)} lacks column(s) "
                         f"{', '.join(missing)}; the header must name detector_id,start,count")
    col_det, col_start, col_count = (names.index(c) for c in CSV_HEADER)
    width = max(col_det, col_start, col_count) + 1
    out = CsvBatch()
    for line_no, line in enumerate(lines, start=2):
        line = line.rstrip("\r\n")
        if not line.strip():
            continue
        index = len(out)
        out.lines.append(line_no)
        if len(line) > MAX_CSV_LINE_CHARS:
            out.append((index, None, None, _BadLine(line_no, f"is {len(line):,} characters long; "
                                                    f"lines are at most {MAX_CSV_LINE_CHARS:,}")))
        else:
            row = _csv_fields(line)
            if isinstance(row, str):
                out.append((index, None, None, _BadLine(line_no, f"is malformed CSV ({row})")))
            elif len(row) < width:
                out.append((index, row[0], None, _BadLine(
                    line_no, f"has {len(row)} field(s); expected detector_id,start,count")))
            else:
                count = row[col_count].strip()
                out.append((index, row[col_det].strip(), row[col_start].strip(),
                            int(count) if count.isdigit() and count.isascii()
                            and len(count) <= MAX_COUNT_DIGITS else _CsvCount(count)))
        if len(out) > max_items:
            break
    _check_size(len(out), max_items)
    return out


def _csv_fields(line: str) -> list[str] | str:
    """The fields of one CSV line (RFC 4180 quoting), or what is wrong with its quoting."""
    if '"' not in line:
        return line.split(",")
    try:
        return next(csv.reader([line], strict=True))
    except csv.Error as exc:
        return str(exc)


def _check_size(n: int, max_items: int) -> None:
    if n == 0:
        raise ValidationFailed("the batch has no items; send at least one count")
    if n > max_items:
        raise PayloadTooLarge(f"the batch has more than {max_items:,} items; split it into batches "
                              f"of at most {max_items:,}", detail={"max_items": max_items})


class _Missing:
    pass


_MISSING = _Missing()
ITEM_FIELDS = frozenset(("detector_id", "start", "count"))  # what a JSON item may hold


@dataclass(frozen=True)
class _NotAnObject:
    type_name: str


@dataclass(frozen=True)
class _UnknownFields:
    names: tuple[str, ...]


@dataclass(frozen=True)
class _BadLine:
    line: int
    problem: str


@dataclass(frozen=True)
class _CsvCount:
    text: str


@dataclass(frozen=True)
class _LongNumber:
    digits: int


# ---------------------------------------------------------------------------- validation


class DetectorGrid(NamedTuple):
    interval_s: int
    timezone: str


COUNTS_ARE = f"counts are whole numbers 0..{MAX_COUNT:,} written with the digits 0-9"


def _count_error(raw: Any) -> tuple[int | None, str | None]:
    if isinstance(raw, _CsvCount):
        text = raw.text
        if _WHOLE_NUMBER.fullmatch(text) is None:
            return None, f"count {shown(text)} is not a whole number; {COUNTS_ARE}"
        digits = len(text.lstrip("-"))
        if digits > MAX_COUNT_DIGITS:
            return None, f"count is a {digits:,}-digit number; {COUNTS_ARE}"
        raw = int(text)
    elif isinstance(raw, _LongNumber):
        return None, f"count is a {raw.digits:,}-digit number; {COUNTS_ARE}"
    elif isinstance(raw, _Missing):
        return None, "count is missing; each item needs detector_id, start and count"
    elif isinstance(raw, float) and raw > MAX_COUNT:
        return None, (f"count {raw!r} is larger than {MAX_COUNT:,}, which no "
                      "detector interval can hold; counts are JSON integers")
    elif isinstance(raw, bool) or not isinstance(raw, int):
        what = shown(raw) if isinstance(raw, str) else repr(raw) if isinstance(raw, float) \
            else orjson.dumps(raw).decode() if raw is None or isinstance(raw, bool) \
            else type(raw).__name__
        return None, (f"count {what} is not an integer; counts are JSON integers 0..{MAX_COUNT:,} "
                      "(not strings, not decimals)")
    if raw < 0:
        return None, f"count {raw} is negative; counts are integers 0..{MAX_COUNT:,}"
    if raw > MAX_COUNT:
        return None, f"count {raw} is larger than {MAX_COUNT:,}, which no detector interval can hold"
    return raw, None


def _echo(value: Any) -> str | None:
    """A client's string as it may appear in an answer: cut to 100 characters, lone
    surrogates escaped (JSON cannot carry them)."""
    if not isinstance(value, str):
        return None
    if len(value) > 100:
        value = value[:100] + "..."
    return value.encode("utf-8", "backslashreplace").decode("utf-8")


def validate_items(
    items: Sequence[RawItem],
    grids: dict[str, DetectorGrid],
    *,
    now_s: float,
    future_tolerance_s: int,
) -> tuple[list[tuple[int, str, int, int]], list[dict[str, Any]]]:
    """Split raw items into valid ``(index, detector_id, start_s, count)`` and rejections.

    A valid item holds only what the database accepts: a registered (hence well-formed)
    detector id, a start inside the accepted window on the detector's grid, and a count
    0..``MAX_COUNT``."""
    valid: list[tuple[int, str, int, int]] = []
    rejected: list[dict[str, Any]] = []
    parsed_starts: dict[Any, int | str] = {}
    offsets = LocalOffsets()
    latest_ok = now_s + future_tolerance_s

    def reject(item: RawItem, message: str, reason: str) -> None:
        rejected.append({"index": item[0], "detector_id": _echo(item[1]),
                         "start": _echo(item[2]), "error": message, "reason": reason})

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
                         "detector_id, start and count", "bad_item")
            continue
        if isinstance(count, _UnknownFields):
            names = ", ".join(repr(n) for n in count.names)
            reject(item, f"unknown field {names}; an item takes only detector_id, start and count",
                   "unknown_field")
            continue
        if isinstance(count, _BadLine):
            reject(item, f"CSV line {count.line} {count.problem}; each line is "
                         "detector_id,start,count", "bad_csv_line")
            continue
        if not isinstance(det, str) or not det:
            reject(item, "detector_id is missing or not a string", "bad_detector_id")
            continue
        if grid is None:
            problem = detector_id_error(det)
            reject(item, problem or f"unknown detector {det!r}; register it with "
                                    "PUT /v1/detectors/{id} first",
                   "bad_detector_id" if problem else "unknown_detector")
            continue
        if not isinstance(start_text, str):
            reject(item, "start is missing or not a string; use an RFC 3339 timestamp with offset, "
                         "e.g. 2026-11-16T08:15:00-06:00", "bad_start")
            continue
        if start is None:
            try:
                start = parse_interval_start(start_text)
            except ValueError as exc:
                start = str(exc)
            parsed_starts[start_text] = start
        if isinstance(start, str):
            reject(item, start, "bad_start")
            continue
        value, problem = _count_error(count)
        if problem is not None:
            reject(item, problem, "bad_count")
            continue
        if start > latest_ok:
            reject(item, f"start {start_text} is more than {future_tolerance_s} s ahead of the "
                         "server clock; check the controller's clock", "future_start")
            continue
        local = start + offsets.offset(grid.timezone, start)
        if local % grid.interval_s:
            reject(item, f"start {start_text} is not on detector {det}'s {grid.interval_s}-second "
                         f"interval grid (local time {local % 86400 // 3600:02d}:"
                         f"{local % 3600 // 60:02d}:{local % 60:02d} is "
                         f"{local % grid.interval_s} s past an interval start)", "off_grid")
            continue
        valid.append((index, det, start, value))  # type: ignore[arg-type]
    return valid, rejected


# ---------------------------------------------------------------------------- storage


def load_grids(conn: Connection, detector_ids: Iterable[str]) -> dict[str, DetectorGrid]:
    # Only well-formed ids are looked up: no registered id holds anything else, and the
    # database must never see a NUL or an unbounded string.
    ids = sorted({d for d in detector_ids if type(d) is str and _ID.fullmatch(d)})
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
    """Insert the valid items of one batch inside the caller's write transaction.

    Rows are inserted in one canonical order, (detector_id, start_s), whatever the order sent:
    two batches that share keys then take their row locks in the same order and cannot
    deadlock on PostgreSQL. Within the batch the first item sent for a key is the one stored."""
    first: dict[tuple[str, int], tuple[int, int]] = {}
    repeats: list[tuple[int, str, int, int]] = []
    rows: list[tuple[str, int, int, float]] = []
    for index, det, start, count in sorted(valid, key=_canonical):
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
        conflicts_to_record.sort(key=lambda c: (c["detector_id"], c["start_s"]))
        conn.execute(models.count_conflicts.insert(), conflicts_to_record)
    result.conflicts.sort(key=lambda c: c["index"])


def _canonical(item: tuple[int, str, int, int]) -> tuple[str, int, int]:
    return item[1], item[2], item[0]


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
            lines = getattr(items, "lines", None)
            if lines is not None:
                for r in rejected:
                    r["line"] = lines[r["index"]]
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
