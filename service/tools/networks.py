"""Demo networks in a database: the builders the tests, the benchmarks and the demo share.

Registers detectors, stores a simulated network's counts or a recorded feed's history through
the product's own ingest (the one history loader), and builds small simulated networks.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import httpx
import numpy as np
from sqlalchemy import Engine

from service.pipeline import ingest
from service.store import detectors as registry
from service.store.engine import write_transaction
from service.store.records import DetectorCreate

# 2026-11-16 00:00 America/Chicago (CST, -06:00)
MONDAY_LOCAL_MIDNIGHT = datetime(2026, 11, 16, 6, 0, tzinfo=UTC)
HISTORY_CHUNK = 10_000  # counts per ingest transaction
ANY_TIME_S = 10**9  # history lies in the past of any clock: no future check


def rfc3339(moment: datetime) -> str:
    return moment.isoformat().replace("+00:00", "Z")


def detector_payload(**overrides: Any) -> dict[str, Any]:
    """The body of ``POST /v1/detectors`` for a 5-minute arterial detector, with overrides."""
    body: dict[str, Any] = {
        "interval_s": 300, "lanes": 2, "timezone": "America/Chicago", "group": "G-ELM-NB",
        "label": "Elm Ave northbound at 5th", "road_class": "arterial", "holiday_calendar": "US",
        "location": {"type": "Point", "coordinates": [-97.51, 35.21]},
    }
    body.update(overrides)
    return body


def make_detector(engine: Engine, detector_id: str = "D1", **overrides: Any) -> None:
    """Register (or update) one detector directly in the store."""
    with write_transaction(engine) as conn:
        registry.upsert_detector(conn, detector_id, DetectorCreate(**detector_payload(**overrides)))


def store_history(engine: Engine, rows: Iterable[tuple[str, str, int]], *,
                  progress: Callable[[int], None] | None = None) -> ingest.BatchResult:
    """Store ``(detector_id, start text, count)`` rows through the product's ingest, in chunks
    of ``HISTORY_CHUNK`` (history is never refused as lying in the future)."""
    total = ingest.BatchResult()
    chunk: list[tuple[int, str, str, int]] = []

    def flush() -> None:
        total.merge(ingest.ingest_items(engine, chunk, future_tolerance_s=ANY_TIME_S))
        if progress:
            progress(len(chunk))
        chunk.clear()

    for det, start, count in rows:
        chunk.append((len(chunk), det, start, count))
        if len(chunk) >= HISTORY_CHUNK:
            flush()
    if chunk:
        flush()
    return total


def feed_history(counts_path: Path, *, until_s: int) -> Iterator[tuple[str, str, int]]:
    """The rows of a recorded feed's counts file that start before ``until_s`` (the feed is in
    time order)."""
    from service.tools.replay import read_feed

    for _line, det, start, start_s, count in read_feed(counts_path):
        if start_s >= until_s:
            break
        yield det, start, count


def load_network(engine: Engine, network: Any, *, until_s: int | None = None) -> int:
    """Register a simulated network's detectors and store its counts (before ``until_s``)."""
    from service.tools import simulate

    registry.import_feature_collection(engine, simulate.detectors_geojson(network))
    ids = [d.detector_id for d in network.detectors]
    keep = np.ones(network.start_s.size, bool) if until_s is None else network.start_s < until_s
    rows = [(ids[int(d)], rfc3339(datetime.fromtimestamp(int(t), UTC)), int(c))
            for d, t, c in zip(network.detector_index[keep], network.start_s[keep],
                               network.count[keep], strict=True)]
    store_history(engine, rows)
    return len(rows)


def small_network(detector_ids: tuple[str, ...], *, history_days: int = 21, test_days: int = 2,
                  inject: bool = False, seed: int = 7) -> Any:
    """A simulated network of some of the demo detectors."""
    from service.tools import simulate

    specs = [d for d in simulate.default_detectors() if d.detector_id in detector_ids]
    return simulate.generate_network(seed=seed, detectors=specs, history_days=history_days,
                                     test_days=test_days, inject=inject)


# ---------------------------------------------------------------------------- a running server


@contextmanager
def serving(database_url: str, *, env: dict[str, str] | None = None,
            log_path: Path | None = None, start_timeout_s: float = 60.0
            ) -> Iterator[tuple[str, subprocess.Popen[bytes]]]:
    """``tallyward serve`` on a free loopback port, for benchmarks and tools: yields the base
    URL and the process once ``/v1/health`` answers; the server is stopped on exit."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    environment = {**{k: v for k, v in os.environ.items() if not k.startswith("TALLYWARD_")},
                   "TALLYWARD_DATABASE_URL": database_url, "TALLYWARD_LOG_LEVEL": "WARNING",
                   **(env or {})}
    log = open(log_path, "wb") if log_path else subprocess.DEVNULL  # noqa: SIM115
    proc = subprocess.Popen([sys.executable, "-m", "service.cli", "serve", "--port", str(port)],
                            cwd=Path(__file__).resolve().parents[2], env=environment,
                            stdout=subprocess.DEVNULL, stderr=log)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + start_timeout_s
        while True:
            try:
                httpx.get(base + "/v1/health", timeout=1)
                break
            except httpx.HTTPError:
                if proc.poll() is not None or time.monotonic() > deadline:
                    tail = log_path.read_text()[-2000:] if log_path else ""
                    raise RuntimeError(f"the server did not start: {tail}") from None
                time.sleep(0.1)
        yield base, proc
    finally:
        proc.terminate()
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
        if log_path:
            log.close()  # type: ignore[union-attr]
