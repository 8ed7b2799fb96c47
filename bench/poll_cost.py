"""What an alert poll and ``GET /v1/health`` cost with 100,000 alerts stored (a measurement,
not a test).

    .venv/bin/python bench/poll_cost.py [--alerts 100000] [--detectors 2000] [--pg URL]

Builds a migrated database (a SQLite file, or a throw-away PostgreSQL database on the server
of ``--pg``) with DETECTORS fitted detectors in 100 groups, their counts (``health_cost.fill``)
and ALERTS alerts (every kind; 5 % open, 2 % group alerts with their members' hidden shares,
1 % suppressed), then times the polls dashboards make (README, "Alerts for dashboards that
poll") and the health check: the store's poll alone, and the request over real HTTP to
``tallyward serve`` (one process, keep-alive client, a read key). On PostgreSQL it prints the
plan of each poll's query (``EXPLAIN ANALYZE``). Prints medians and 99th percentiles in
milliseconds, and the load average, which on a shared machine moves every figure.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "bench"))

import httpx  # noqa: E402
from fastapi import Response  # noqa: E402
from health_cost import fill  # noqa: E402
from sqlalchemy import create_engine, text  # noqa: E402

from service.config import Settings  # noqa: E402
from service.domain import CAUSES, KINDS  # noqa: E402
from service.store import alerts as alert_store  # noqa: E402
from service.store import migrations as migrate  # noqa: E402
from service.store.engine import make_engine  # noqa: E402
from service.store.keys import create_key  # noqa: E402
from service.store.scratch import scratch_database  # noqa: E402
from service.tools.networks import serving  # noqa: E402
from service.web.routes.health import health  # noqa: E402

GROUPS = 100


def fill_alerts(url: str, *, n_alerts: int, n_detectors: int) -> int:
    """Store ``n_alerts`` alert rows with seq 1..n (the counter set to n); returns n."""
    engine = create_engine(url)
    t0 = int(time.time()) - n_alerts * 300
    with engine.begin() as conn:
        conn.execute(text("UPDATE detectors SET group_id = :g WHERE detector_id = :d"),
                     [{"g": f"G{i % GROUPS:03d}", "d": f"H{i:05d}"} for i in range(n_detectors)])
        rows: list[dict[str, Any]] = []
        seq = 0
        group_alert_id = None
        for i in range(n_alerts):
            seq += 1
            det = f"H{i % n_detectors:05d}"
            group = f"G{i % n_detectors % GROUPS:03d}"
            is_group = i % 50 == 0  # 2 %: a group alert; the next row is a member's share
            share = i % 50 == 1
            rows.append({
                "alert_id": i + 1, "seq": seq,
                "subject": f"group:{group}" if is_group else det,
                "detector_id": None if is_group else det, "group_id": group,
                "kind": KINDS[i % len(KINDS)], "cause": CAUSES[i % len(CAUSES)],
                "status": "open" if i % 20 == 0 else "closed", "withdrawn": 0,
                "start_s": t0 + 300 * i, "end_s": t0 + 300 * i + 1800,
                "closed_s": None if i % 20 == 0 else t0 + 300 * i + 3600,
                "observed": 0.0, "expected": 40.0, "log_p": -30.0, "n_intervals": 6,
                "detectors": f'["{det}"]' if is_group else None,
                "part_of": group_alert_id if share else None, "baseline_id": None,
                "summary": "benchmark alert", "created_s": t0, "updated_s": t0,
                "suppressed": 1 if i % 100 == 7 else 0})
            if is_group:
                group_alert_id = i + 1
            if len(rows) == 5000:
                _insert(conn, rows)
                rows = []
        if rows:
            _insert(conn, rows)
        conn.execute(text("UPDATE counters SET value = :n WHERE name = 'alert_seq'"), {"n": seq})
        if conn.dialect.name == "postgresql":
            conn.execute(text("SELECT setval(pg_get_serial_sequence('alerts', 'alert_id'), :n)"),
                         {"n": n_alerts})
    with engine.connect().execution_options(isolation_level="AUTOCOMMIT") as conn:
        conn.execute(text("ANALYZE"))
    engine.dispose()
    return seq


def _insert(conn: Any, rows: list[dict[str, Any]]) -> None:
    cols = ", ".join(rows[0])
    conn.execute(text(f"INSERT INTO alerts ({cols}) VALUES ("
                      + ", ".join(f":{c}" for c in rows[0]) + ")"), rows)


def timings(fn: Callable[[], Any], repeats: int) -> tuple[float, float]:
    for _ in range(20):  # warm caches and connections
        fn()
    out = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        out.append((time.perf_counter() - t) * 1000)
    out.sort()
    return statistics.median(out), out[round(0.99 * (len(out) - 1))]


def cases(high: int) -> list[tuple[str, dict[str, Any]]]:
    """(name, query parameters) of the polls measured."""
    return [
        ("caught up, no filter", {"after": high, "limit": 500}),
        ("caught up, status+kind+group", {"after": high, "limit": 500, "status": "open",
                                          "kind": "zero_counts", "group": "G007"}),
        ("page of 100 (catching up)", {"after": high - 5000, "limit": 100}),
        ("page of 500 (catching up)", {"after": high - 5000, "limit": 500}),
        ("from 0, group+kind filter", {"after": 0, "limit": 100, "group": "G007",
                                       "kind": "repeated_value"}),
        ("from 0, open only", {"after": 0, "limit": 500, "status": "open"}),
    ]


def store_args(params: dict[str, Any]) -> dict[str, Any]:
    return {"after": params["after"], "limit": params["limit"],
            "status": params.get("status", "any"), "kind": params.get("kind"),
            "group": params.get("group"), "detector_id": params.get("detector_id")}


def load() -> str:
    return "load average " + " ".join(f"{x:.2f}" for x in os.getloadavg())


def measure(url: str, *, n_alerts: int, n_detectors: int, n_counts: int, repeats: int) -> None:
    started = time.perf_counter()
    migrate.upgrade(url)
    fill(url, n_counts=n_counts, n_detectors=n_detectors)
    high = fill_alerts(url, n_alerts=n_alerts, n_detectors=n_detectors)
    settings = Settings(database_url=url, scoring="off")
    engine = make_engine(settings)
    key = create_key(engine, name="bench-read", role="read")
    print(f"{engine.dialect.name}: {n_alerts:,} alerts, {n_detectors:,} detectors, "
          f"{n_counts:,} counts (built in {time.perf_counter() - started:.0f} s); {load()}")
    if engine.dialect.name == "postgresql":
        explain(engine, high)
    print(f"  {'in process (store poll / health handler)':44s} median      p99")
    for name, params in cases(high):
        args = store_args(params)
        n = len(alert_store.poll(engine, query="", if_none_match=None, **args).page["data"])
        med, p99 = timings(lambda args=args: alert_store.poll(
            engine, query="", if_none_match=None, **args), repeats)
        print(f"  poll {name:34s} {n:4d} rows {med:7.2f} ms {p99:7.2f} ms")
    med, p99 = timings(lambda: health(engine, settings, Response()), repeats)
    print(f"  {'GET /v1/health handler':44s} {med:7.2f} ms {p99:7.2f} ms   {load()}")
    engine.dispose()
    with serving(url, env={"TALLYWARD_SCORING": "off"}) as (base, _proc), \
            httpx.Client(base_url=base, timeout=10,
                         headers={"Authorization": f"Bearer {key}"}) as client:
        print(f"  {'over HTTP (tallyward serve, 1 process)':44s} median      p99")
        for name, params in cases(high):
            med, p99 = timings(lambda params=params: _ok(client.get("/v1/alerts",
                                                                    params=params)), repeats)
            print(f"  GET /v1/alerts {name:34s} {med:7.2f} ms {p99:7.2f} ms")
        med, p99 = timings(lambda: _ok(client.get("/v1/health")), repeats)
        print(f"  {'GET /v1/health':44s} {med:7.2f} ms {p99:7.2f} ms   {load()}")


def _ok(r: httpx.Response) -> httpx.Response:
    if r.status_code != 200:
        raise RuntimeError(f"{r.request.url}: {r.status_code} {r.text[:300]}")
    return r


def explain(engine: Any, high: int) -> None:
    """Print the plan of each poll's page query (EXPLAIN ANALYZE, PostgreSQL)."""
    from sqlalchemy.dialects import postgresql

    for name, params in cases(high):
        args = store_args(params)
        del args["detector_id"]
        q = alert_store.poll_query(**{k: v for k, v in args.items() if v is not None})
        sql = str(q.compile(dialect=postgresql.dialect(), compile_kwargs={"literal_binds": True}))
        with engine.connect() as conn:
            plan = [r[0] for r in conn.execute(text("EXPLAIN (ANALYZE, COSTS OFF) " + sql))]
        print(f"  plan: poll {name}")
        for line in plan:
            print(f"      {line}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--alerts", type=int, default=100_000)
    parser.add_argument("--detectors", type=int, default=2_000)
    parser.add_argument("--counts", type=int, default=200_000)
    parser.add_argument("--repeats", type=int, default=300)
    parser.add_argument("--pg", help="a PostgreSQL server URL; a throw-away database is made")
    args = parser.parse_args()
    sizes = {"n_alerts": args.alerts, "n_detectors": args.detectors, "n_counts": args.counts,
             "repeats": args.repeats}
    if args.pg:
        with scratch_database(args.pg, "tallyward_poll", migrate=False) as url:
            measure(url, **sizes)
        return
    with tempfile.TemporaryDirectory() as folder:
        measure(f"sqlite:///{Path(folder) / 'poll.db'}", **sizes)


if __name__ == "__main__":
    main()
