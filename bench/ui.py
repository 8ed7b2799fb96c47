"""Server-side render time of the web view's pages on a large database (a measurement, not a
test).

    .venv/bin/python bench/ui.py [--detectors 5000] [--alerts 100000] [--rounds 15] [--pg URL]

Builds a migrated database (a SQLite file, or a throw-away PostgreSQL database on the server
of ``--pg``) holding DETECTORS detectors at 5-minute intervals with locations and groups, the
last 24 hours of their counts, ALERTS alerts (2 % of them open), and one detector with 21 days
of simulated history and a fitted baseline. Then renders, in process through the whole app
(Starlette's test client, signed in with a read key): the network page, the open alerts page
and the alerts page with every status, and that detector's day. Prints the median and 95th
percentile in milliseconds, the page size, and the ratio of each median to the 300 ms target.
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

from sqlalchemy import create_engine, text  # noqa: E402
from starlette.testclient import TestClient  # noqa: E402

from service.config import Settings  # noqa: E402
from service.pipeline import fit as fitting  # noqa: E402
from service.store import keys as security  # noqa: E402
from service.store import migrations as migrate  # noqa: E402
from service.store.engine import make_engine  # noqa: E402
from service.store.scratch import scratch_database  # noqa: E402
from service.tools.networks import load_network, small_network  # noqa: E402
from service.web.app import create_app  # noqa: E402

TARGET_MS = 300.0  # the bound on a median server-side render
DAY_S = 86_400
KINDS = ("zero_counts", "low_volume", "high_volume", "over_capacity", "repeated_value",
         "no_reports")


def fill(url: str, *, n_detectors: int, n_alerts: int) -> None:
    engine = create_engine(url)
    last = int(time.time()) // 300 * 300 - 300
    with engine.begin() as conn:
        conn.execute(text(
            "INSERT INTO detectors (detector_id, label, group_id, road_class, lanes, interval_s, "
            "timezone, lon, lat, created_s, updated_s) VALUES (:d, :label, :g, 'arterial', 2, "
            "300, 'America/Chicago', :lon, :lat, 0, 0)"),
            [{"d": f"B{i:05d}", "label": f"Bench street {i // 4} lane {i % 4 + 1}",
              "g": f"BG{i // 4:04d}", "lon": -100.9 + (i % 71) * 0.01,
              "lat": 36.0 + (i // 71) * 0.006} for i in range(n_detectors)])
        # The last 24 hours of counts of every detector, with a few gaps (one in 97).
        per_day = DAY_S // 300
        conn.execute(text(
            "WITH RECURSIVE k(n) AS (SELECT 0 UNION ALL SELECT n + 1 FROM k WHERE n < :m) "
            "INSERT INTO counts (detector_id, start_s, count, received_s) "
            "SELECT d.detector_id, :last - k.n * 300, 20 + (k.n % 37), 0 FROM detectors d, k "
            "WHERE (k.n + length(d.detector_id)) % 97 <> 0 AND d.detector_id LIKE 'B%'"),
            {"m": per_day - 1, "last": last})
        rows = []
        for i in range(n_alerts):
            start = last - (i % 2000) * 1800 - (i // 2000) * 60
            is_open = i % 50 == 0
            rows.append({"seq": i + 1, "d": f"B{i % n_detectors:05d}",
                         "g": f"BG{(i % n_detectors) // 4:04d}", "kind": KINDS[i % len(KINDS)],
                         "cause": ("detector", "traffic", "communications")[i % 3],
                         "status": "open" if is_open else "closed", "start": start,
                         "end": start + 900, "closed": None if is_open else start + 2700,
                         "summary": f"bench alert {i}: counted 0 vehicles where about 41 "
                                    "were expected"})
        conn.execute(text(
            "INSERT INTO alerts (seq, subject, detector_id, group_id, kind, cause, status, "
            "withdrawn, start_s, end_s, closed_s, observed, expected, log_p, n_intervals, "
            "summary, created_s, updated_s) VALUES (:seq, :d, :d, :g, :kind, :cause, :status, "
            "0, :start, :end, :closed, 0, 41.5, -30.2, 3, :summary, 0, 0)"), rows)
        conn.execute(text("UPDATE counters SET value = :v WHERE name = 'alert_seq'"),
                     {"v": n_alerts})
    engine.dispose()


def timed(client: TestClient, path: str, rounds: int) -> tuple[float, float, int]:
    client.get(path)  # warm: first-use imports and caches
    spent = []
    size = 0
    for _ in range(rounds):
        t = time.perf_counter()
        r = client.get(path)
        spent.append((time.perf_counter() - t) * 1000)
        assert r.status_code == 200, (path, r.status_code, r.text[:300])
        size = len(r.content)
    spent.sort()
    return statistics.median(spent), spent[min(len(spent) - 1, int(0.95 * len(spent)))], size


def run(url: str, *, n_detectors: int, n_alerts: int, rounds: int) -> None:
    migrate.upgrade(url)
    t = time.perf_counter()
    fill(url, n_detectors=n_detectors, n_alerts=n_alerts)
    settings = Settings(database_url=url, scoring="off", log_level="WARNING")
    engine = make_engine(settings)
    net = small_network(("bra3-nb-t1",), history_days=21, test_days=1, seed=3)
    load_network(engine, net)
    fitting.fit_many(settings, engine, as_of_s=net.test_start_s, workers=1)
    print(f"built in {time.perf_counter() - t:.0f} s: {n_detectors:,} detectors with 24 h of "
          f"counts, {n_alerts:,} alerts, one fitted detector", file=sys.stderr)
    key = security.create_key(engine, name="bench-read", role="read")
    from datetime import datetime
    from zoneinfo import ZoneInfo
    day = datetime.fromtimestamp(net.test_start_s, ZoneInfo("America/Chicago")).date()
    pages = (("network page", "/ui/network"),
             ("alerts page (open)", "/ui/alerts?status=open"),
             ("alerts page (any status)", "/ui/alerts?status=any"),
             ("detector day", f"/ui/detectors/bra3-nb-t1?date={day.isoformat()}"))
    # The reads alone (store functions, no HTML): what the page's own rendering adds is the rest.
    from service.store import overview
    reads = []
    for _ in range(rounds):
        t = time.perf_counter()
        overview.network(engine, settings)
        reads.append((time.perf_counter() - t) * 1000)
    print(f"network reads alone (store.overview.network): median "
          f"{statistics.median(reads):.1f} ms")
    with TestClient(create_app(settings, engine=engine)) as client:
        r = client.post("/ui/login", data={"key": key}, follow_redirects=False)
        assert r.status_code == 303, r.text
        print(f"{'page':<26}{'median ms':>10}{'p95 ms':>9}{'KiB':>8}{'median/target':>15}")
        for name, path in pages:
            median, p95, size = timed(client, path, rounds)
            print(f"{name:<26}{median:>10.1f}{p95:>9.1f}{size / 1024:>8.0f}"
                  f"{median / TARGET_MS:>15.2f}")
    engine.dispose()


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--detectors", type=int, default=5000)
    parser.add_argument("--alerts", type=int, default=100_000)
    parser.add_argument("--rounds", type=int, default=15)
    parser.add_argument("--pg", help="PostgreSQL server URL (a throw-away database is made)")
    args = parser.parse_args()
    if args.pg is None:
        with tempfile.TemporaryDirectory() as folder:
            run(f"sqlite:///{folder}/ui.db", n_detectors=args.detectors, n_alerts=args.alerts,
                rounds=args.rounds)
        return 0
    with scratch_database(args.pg, "tallyward_bench_ui", migrate=False) as url:
        run(url, n_detectors=args.detectors, n_alerts=args.alerts, rounds=args.rounds)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
