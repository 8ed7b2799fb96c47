"""What one ``GET /v1/health`` costs on a large database (a measurement, not a test).

    .venv/bin/python bench/health_cost.py [--counts 1000000] [--detectors 2000] [--pg URL]

Builds a migrated database (a SQLite file, or a throw-away PostgreSQL database on the server
of ``--pg``) with DETECTORS fitted detectors reporting up to now (a quarter of them with
scoring work waiting) and COUNTS counts, then times the health handler alone, the request
through the app in process (Starlette's test client) and over real HTTP to ``tallyward
serve``. Prints medians and 95th percentiles in milliseconds.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

import httpx  # noqa: E402
from fastapi import Response  # noqa: E402
from sqlalchemy import create_engine, text  # noqa: E402
from starlette.testclient import TestClient  # noqa: E402

from service.config import Settings  # noqa: E402
from service.store import migrations as migrate  # noqa: E402
from service.store.engine import make_engine  # noqa: E402
from service.store.scratch import scratch_database  # noqa: E402
from service.tools.networks import serving  # noqa: E402
from service.web.app import create_app  # noqa: E402
from service.web.routes.health import health  # noqa: E402


def fill(url: str, *, n_counts: int, n_detectors: int) -> None:
    engine = create_engine(url)
    per = -(-n_counts // n_detectors)
    now = time.time()
    # Every detector reports up to the last complete 5-minute interval: scored through it, and
    # a quarter of them have new counts waiting to be scored.
    last = int(now) // 300 * 300 - 300
    t0 = last - 300 * (per - 1)
    with engine.begin() as conn:
        conn.execute(text(
            "INSERT INTO detectors (detector_id, road_class, lanes, interval_s, timezone, "
            "created_s, updated_s) VALUES (:d, 'arterial', 2, 300, 'America/Chicago', 0, 0)"),
            [{"d": f"H{i:05d}"} for i in range(n_detectors)])
        conn.execute(text(
            "INSERT INTO baselines (detector_id, fitted_s, as_of_s, window_start_s, window_end_s, "
            "model, summary) VALUES (:d, 0, :t, :t, :t, '{}', '{}')"),
            [{"d": f"H{i:05d}", "t": t0} for i in range(n_detectors)])
        conn.execute(text(
            "INSERT INTO detector_state (detector_id, baseline_id, score_from_s, dirty_from_s, "
            "scored_through_s, pending_since_s, updated_s) SELECT b.detector_id, b.baseline_id, "
            ":t, CASE WHEN b.baseline_id % 4 = 0 THEN :t ELSE NULL END, :end, "
            "CASE WHEN b.baseline_id % 4 = 0 THEN :now ELSE NULL END, 0 FROM baselines b"),
            {"t": t0, "end": last + 300, "now": now})
    rows = ((f"H{i % n_detectors:05d}", t0 + 300 * (i // n_detectors), i % 90, now)
            for i in range(n_counts))
    raw = engine.raw_connection()
    try:
        cur = raw.cursor()
        if url.startswith("sqlite"):
            cur.executemany("INSERT INTO counts (detector_id, start_s, count, received_s) "
                            "VALUES (?, ?, ?, ?)", rows)
        else:
            with cur.copy("COPY counts (detector_id, start_s, count, received_s) FROM STDIN") as cp:
                for row in rows:
                    cp.write_row(row)
        raw.commit()
        cur.close()
    finally:
        raw.close()
    with engine.connect().execution_options(isolation_level="AUTOCOMMIT") as conn:
        conn.execute(text("ANALYZE"))
    engine.dispose()


def timings(fn, repeats: int) -> tuple[float, float]:  # type: ignore[no-untyped-def]
    for _ in range(20):  # warm caches and connections
        fn()
    out = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        out.append((time.perf_counter() - t) * 1000)
    out.sort()
    return statistics.median(out), out[int(0.95 * (len(out) - 1))]


def measure(url: str, *, n_counts: int, n_detectors: int, repeats: int) -> None:
    started = time.perf_counter()
    migrate.upgrade(url)
    fill(url, n_counts=n_counts, n_detectors=n_detectors)
    settings = Settings(database_url=url, scoring="off")
    engine = make_engine(settings)
    body = health(engine, settings, Response())
    print(f"{engine.dialect.name}: {n_counts:,} counts, {n_detectors:,} detectors "
          f"(built in {time.perf_counter() - started:.0f} s); health says "
          f"counts_stored={body['counts_stored']:,} backlog={body['scoring_backlog']} "
          f"status={body['status']}")
    med, p95 = timings(lambda: health(engine, settings, Response()), repeats)
    print(f"  handler alone          median {med:6.2f} ms   p95 {p95:6.2f} ms")
    client = TestClient(create_app(settings, engine=engine))
    med, p95 = timings(lambda: client.get("/v1/health"), repeats)
    print(f"  request through app    median {med:6.2f} ms   p95 {p95:6.2f} ms")
    med, p95 = over_uvicorn(url, repeats)
    print(f"  over HTTP (uvicorn)    median {med:6.2f} ms   p95 {p95:6.2f} ms")
    with engine.connect() as conn:
        t = time.perf_counter()
        exact = conn.execute(text("SELECT count(*) FROM counts")).scalar()
        print(f"  (for scale: an exact count(*) of {exact:,} counts takes "
              f"{(time.perf_counter() - t) * 1000:.1f} ms)")
    engine.dispose()


def over_uvicorn(url: str, repeats: int) -> tuple[float, float]:
    """The request over real HTTP to ``tallyward serve`` (one worker, keep-alive client)."""
    with serving(url, env={"TALLYWARD_SCORING": "off"}) as (base, _proc), \
            httpx.Client(base_url=base, timeout=5) as client:
        return timings(lambda: client.get("/v1/health"), repeats)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--counts", type=int, default=1_000_000)
    parser.add_argument("--detectors", type=int, default=2_000)
    parser.add_argument("--repeats", type=int, default=300)
    parser.add_argument("--pg", help="a PostgreSQL server URL; a throw-away database is made")
    args = parser.parse_args()
    if args.pg:
        with scratch_database(args.pg, "tallyward_health", migrate=False) as url:
            measure(url, n_counts=args.counts, n_detectors=args.detectors, repeats=args.repeats)
        return
    with tempfile.TemporaryDirectory() as folder:
        measure(f"sqlite:///{Path(folder) / 'health.db'}", n_counts=args.counts,
                n_detectors=args.detectors, repeats=args.repeats)


if __name__ == "__main__":
    main()
