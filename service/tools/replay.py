"""Replay a recorded feed through a running Tallyward's HTTP API, as field controllers would.

Rows are sent in time order. At a finite speed (``60x``: one minute of feed a second) each
controller — the detectors of one group, or one ungrouped detector — posts one batch per
interval, when the feed clock reaches it. At ``max`` speed rows go in larger batches as fast
as the service takes them. Connection errors and 503s are retried with backoff (the
service's idempotent ingest makes a resend safe); a 401/403 stops at once.
"""

from __future__ import annotations

import sys
import time
import zlib
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

import httpx
import orjson

from service.timefmt import parse_rfc3339


class ReplayError(Exception):
    """The replay cannot go on; the message says why and how to resume."""


@dataclass
class ReplaySummary:
    rows: int = 0
    batches: int = 0
    accepted: int = 0
    duplicate: int = 0
    conflict: int = 0
    rejected: int = 0
    retries: int = 0
    seconds: float = 0.0
    last_start: str | None = None
    rejected_examples: list[dict[str, Any]] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return {k: v for k, v in self.__dict__.items()}


def feed_paths(feed: str | Path) -> tuple[Path, Path | None]:
    """The counts file of a feed folder (or the file itself), and its detectors file if any."""
    path = Path(feed)
    if path.is_dir():
        for name in ("counts.csv.gz", "counts.csv"):
            if (path / name).exists():
                detectors = path / "detectors.geojson"
                return path / name, detectors if detectors.exists() else None
        raise ReplayError(f"{path} has no counts.csv.gz or counts.csv")
    if not path.exists():
        raise ReplayError(f"feed {path} does not exist")
    sibling = path.parent / "detectors.geojson"
    return path, sibling if sibling.exists() else None


def controllers(detectors_file: Path | None) -> dict[str, str]:
    """detector id -> controller (its group, or itself when ungrouped)."""
    if detectors_file is None:
        return {}
    doc = orjson.loads(detectors_file.read_bytes())
    out = {}
    for f in doc.get("features", []):
        props = f.get("properties", {})
        det = str(props.get("detector_id", f.get("id")))
        out[det] = props.get("group") or det
    return out


FEED_CHUNK_LINES = 10_000  # lines parsed at a time


def read_feed(path: Path) -> Iterator[tuple[int, str, str, int, int]]:
    """(line, detector_id, start text, start_s, count) rows; a bad or truncated file raises
    ``ReplayError`` naming the line.

    The file is read by the product's count-CSV reader (``textio.csv_chunks`` and
    ``ingest.parse_csv_batch``), so a feed replays exactly what ``import-counts`` would load.
    """
    from service.errors import TallywardError
    from service.pipeline.ingest import parse_csv_batch
    from service.textio import csv_chunks, open_text

    stream: TextIO = open_text(str(path))
    line = 1
    starts: dict[str, int] = {}
    try:
        for first, body in csv_chunks(stream, chunk=FEED_CHUNK_LINES):
            try:
                batch = parse_csv_batch(body, max_items=FEED_CHUNK_LINES + 1)
            except TallywardError as exc:
                if not body.split(b"\n", 1)[1].strip():  # only blank lines in this chunk
                    continue
                raise ReplayError(f"{path} line 1: {exc.message}") from None
            for (_index, det, start, count), chunk_line in zip(batch, batch.lines, strict=True):
                line = first - 2 + chunk_line
                try:
                    if not isinstance(count, int):  # a malformed line or a non-digit count
                        count = int(getattr(count, "text", None) or "")
                    start_s = starts.get(start)
                    if start_s is None:
                        start_s = starts[start] = parse_rfc3339(start)
                except (TypeError, ValueError) as exc:
                    problem = getattr(batch[_index][3], "problem", None) or str(exc)
                    raise ReplayError(f"{path} line {line}: malformed row ({problem})") from None
                yield line, det, start, start_s, count
    except TallywardError as exc:
        raise ReplayError(f"{path}: {exc.message}") from None
    except (EOFError, zlib.error, OSError) as exc:
        raise ReplayError(f"{path} is truncated or corrupt after line {line} ({exc}); rows up to "
                          "there were sent") from None
    finally:
        stream.close()


def parse_speed(text: str) -> float | None:
    """``max`` -> None (as fast as possible); ``60x`` or ``60`` -> 60.0 feed seconds a second."""
    if text == "max":
        return None
    try:
        value = float(text.rstrip("x"))
    except ValueError:
        raise ReplayError(f"--speed {text!r}: use max or a factor such as 60x") from None
    if value <= 0:
        raise ReplayError("--speed must be positive")
    return value


class Poster:
    """Posts batches with retries; raises ``ReplayError`` on auth failures or when the
    service stays unreachable."""

    def __init__(self, url: str, key: str | None, *, max_wait_s: float = 120.0,
                 out: TextIO | None = None) -> None:
        headers = {"Content-Type": "application/json"}
        if key:
            headers["Authorization"] = f"Bearer {key}"
        self.client = httpx.Client(base_url=url.rstrip("/"), headers=headers, timeout=60)
        self.max_wait_s = max_wait_s
        self.out = out or sys.stderr

    def post(self, items: list[dict[str, Any]], summary: ReplaySummary) -> dict[str, Any]:
        body = orjson.dumps({"counts": items})
        delay, waited = 0.5, 0.0
        while True:
            try:
                r = self.client.post("/v1/counts", content=body)
            except httpx.TransportError as exc:
                problem = f"cannot reach {self.client.base_url} ({type(exc).__name__})"
            else:
                if r.status_code in (401, 403):
                    msg = r.json().get("message", r.text) if r.headers.get(
                        "content-type", "").startswith("application/json") else r.text
                    raise ReplayError(f"the service refused the key ({r.status_code}): {msg}. "
                                      "Use a key with role ingest or admin (--key-file or "
                                      "$TALLYWARD_API_KEY).")
                if r.status_code in (200, 409, 422):
                    return r.json()
                if r.status_code == 413:
                    raise ReplayError(f"batch too large for the service: {r.json().get('message')}"
                                      "; use a smaller --batch")
                if r.status_code < 500:
                    raise ReplayError(f"unexpected answer {r.status_code}: {r.text[:300]}")
                problem = f"service answered {r.status_code}"
                retry_after = r.headers.get("retry-after")
                if retry_after and retry_after.isdigit():
                    delay = max(delay, float(retry_after))
            if waited >= self.max_wait_s:
                first = items[0]["start"]
                raise ReplayError(f"{problem}; gave up after {waited:.0f} s of retries. Nothing "
                                  f"from {first} on is known to be stored: resume with "
                                  f"--from {first} (resent rows count as duplicates)")
            summary.retries += 1
            print(f"  {problem}; retrying in {delay:.1f} s", file=self.out)
            time.sleep(delay)
            waited += delay
            delay = min(delay * 2, 15.0)

    def close(self) -> None:
        self.client.close()


def replay(feed: str | Path, *, url: str, key: str | None, speed: str = "max",
           from_s: int | None = None, until_s: int | None = None, batch: int = 5000,
           progress: Callable[[int], None] | None = None, max_wait_s: float = 120.0,
           out: TextIO | None = None) -> ReplaySummary:
    counts_path, detectors_path = feed_paths(feed)
    owner = controllers(detectors_path)
    rate = parse_speed(speed)
    out = out or sys.stderr
    poster = Poster(url, key, max_wait_s=max_wait_s, out=out)
    summary = ReplaySummary()
    started = time.perf_counter()
    feed_t0: int | None = None
    pending: dict[str, list[dict[str, Any]]] = {}
    pending_start: int | None = None

    def send(items: list[dict[str, Any]]) -> None:
        result = poster.post(items, summary)
        summary.batches += 1
        summary.accepted += result.get("accepted", 0)
        summary.duplicate += result.get("duplicate", 0)
        summary.conflict += result.get("conflict", 0)
        summary.rejected += result.get("rejected", 0)
        for err in result.get("errors", []):
            if len(summary.rejected_examples) < 20:
                summary.rejected_examples.append(err)
            print(f"  rejected {err.get('detector_id')} {err.get('start')}: {err.get('error')}",
                  file=out)
        summary.last_start = items[-1]["start"]
        if progress:
            progress(len(items))

    def flush_interval() -> None:
        for items in pending.values():
            send(items)
        pending.clear()

    try:
        buffer: list[dict[str, Any]] = []
        for _line, det, start, start_s, count in read_feed(counts_path):
            if from_s is not None and start_s < from_s:
                continue
            if until_s is not None and start_s >= until_s:
                break
            summary.rows += 1
            item = {"detector_id": det, "start": start, "count": count}
            if rate is None:
                buffer.append(item)
                if len(buffer) >= batch:
                    send(buffer)
                    buffer = []
                continue
            if pending_start is not None and start_s != pending_start:
                flush_interval()
            if pending_start != start_s:
                if feed_t0 is None:
                    feed_t0 = start_s
                due = started + (start_s - feed_t0) / rate
                pause = due - time.perf_counter()
                if pause > 0:
                    time.sleep(pause)
                pending_start = start_s
            pending.setdefault(owner.get(det, det), []).append(item)
        if buffer:
            send(buffer)
        flush_interval()
    finally:
        poster.close()
        summary.seconds = round(time.perf_counter() - started, 2)
    return summary


def wait_for_scoring(url: str, *, timeout_s: float = 600.0) -> int:
    """Poll ``/v1/health`` until the scoring backlog is zero; returns the last backlog seen."""
    deadline = time.monotonic() + timeout_s
    backlog = -1
    with httpx.Client(base_url=url.rstrip("/"), timeout=30) as c:
        while time.monotonic() < deadline:
            try:
                backlog = int(c.get("/v1/health").json().get("scoring_backlog", 0))
            except (httpx.HTTPError, ValueError):
                backlog = -1
            if backlog == 0:
                return 0
            time.sleep(0.5)
    return backlog

