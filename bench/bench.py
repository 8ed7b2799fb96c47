"""Tallyward benchmarks: figures and ratios against the ideal, printed in one run.

    .venv/bin/python bench/bench.py [--only ingest|fit|score|score-db|latency|fit-api] [--pg URL]

ingest  HTTP ingest through a real uvicorn into SQLite (1,000-count batches, one client)
        vs a bare sqlite3 executemany of the same rows into the same schema.
Medians of several repeats; this machine is small and noisy, so read ratios first.
"""

from __future__ import annotations

import argparse
import shutil
import sqlite3
import statistics
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import httpx
import orjson

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from service.config import Settings  # noqa: E402
from service.store import keys as security  # noqa: E402
from service.store import migrations as migrate  # noqa: E402
from service.store.engine import make_engine  # noqa: E402
from service.timefmt import parse_rfc3339  # noqa: E402
from service.tools.networks import make_detector, serving  # noqa: E402

BATCH = 1000


def make_batches(n_detectors: int, n_batches: int) -> list[list[dict]]:
    """Batches of 1,000 counts: every detector's next intervals, as a controller would send."""
    start = datetime(2026, 9, 7, 5, 0, tzinfo=UTC)
    per_det = BATCH // n_detectors
    batches = []
    for b in range(n_batches):
        items = []
        for d in range(n_detectors):
            for k in range(per_det):
                t = start + timedelta(seconds=300 * (b * per_det + k))
                items.append({"detector_id": f"B{d:04d}", "start": t.strftime("%Y-%m-%dT%H:%M:%SZ"),
                              "count": (d * 7 + k) % 90})
        batches.append(items)
    return batches


def fresh_db(folder: Path, name: str, n_detectors: int) -> str:
    url = f"sqlite:///{folder / name}"
    migrate.upgrade(url)
    engine = make_engine(Settings(database_url=url))
    for d in range(n_detectors):  # stations of four lanes, each its own group
        make_detector(engine, f"B{d:04d}", group=f"G-B{d // 4:03d}")
    engine.dispose()
    return url


def http_ingest(url: str, batches: list[list[dict]]) -> float:
    engine = make_engine(Settings(database_url=url))
    key = security.create_key(engine, name=f"bench-{time.monotonic_ns()}", role="ingest")
    engine.dispose()
    log_path = Path(url.removeprefix("sqlite:///")).with_suffix(".log")
    with serving(url, log_path=log_path) as (base, _proc):
        bodies = [orjson.dumps({"counts": b}) for b in batches]
        headers = {"Authorization": f"Bearer {key}", "Content-Type": "application/json"}
        with httpx.Client(base_url=base, timeout=60) as c:
            t0 = time.perf_counter()
            for body in bodies:
                r = c.post("/v1/counts", content=body, headers=headers)
                assert r.status_code == 200, r.text
            elapsed = time.perf_counter() - t0
        return sum(len(b) for b in batches) / elapsed


def bare_executemany(path: Path, batches: list[list[dict]]) -> float:
    rows = [[(i["detector_id"], parse_rfc3339(i["start"]), i["count"], 0.0) for i in b]
            for b in batches]
    conn = sqlite3.connect(path, isolation_level=None)
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA synchronous=NORMAL")
    conn.execute("PRAGMA foreign_keys=ON")
    sql = ("INSERT INTO counts (detector_id, start_s, count, received_s) VALUES (?, ?, ?, ?) "
           "ON CONFLICT (detector_id, start_s) DO NOTHING")
    t0 = time.perf_counter()
    for batch in rows:
        conn.execute("BEGIN IMMEDIATE")
        conn.executemany(sql, batch)
        conn.execute("COMMIT")
    elapsed = time.perf_counter() - t0
    conn.close()
    return sum(len(b) for b in rows) / elapsed


def bench_ingest(repeats: int) -> None:
    print("== ingest: HTTP (uvicorn, 1 worker, 1 client, 1,000-count batches) into SQLite ==")
    batches = make_batches(100, 100)
    http_rates, bare_rates = [], []
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        template = Path(fresh_db(folder, "template.db", 100).removeprefix("sqlite:///"))
        for r in range(repeats):
            a = folder / f"http{r}.db"
            shutil.copy(template, a)
            http_rates.append(http_ingest(f"sqlite:///{a}", batches))
            b = folder / f"bare{r}.db"
            shutil.copy(template, b)
            bare_rates.append(bare_executemany(b, batches))
    h, b = statistics.median(http_rates), statistics.median(bare_rates)
    print(f"  HTTP ingest          {h:>10,.0f} counts/s   (median of {repeats}: "
          + ", ".join(f"{x:,.0f}" for x in http_rates) + ")")
    print(f"  bare executemany     {b:>10,.0f} counts/s   (median of {repeats}: "
          + ", ".join(f"{x:,.0f}" for x in bare_rates) + ")")
    print(f"  ratio bare/HTTP      {b / h:>10.2f}x   (target <= 3x; target HTTP >= 20,000 counts/s)")


def synthetic_history(n_detectors: int, days: int, seed: int = 11):
    """5-minute counts with two peaks, a weekend shape and gamma day factors (numpy only)."""
    import numpy as np

    rng = np.random.default_rng(seed)
    start = int(datetime(2026, 9, 7, 5, 0, tzinfo=UTC).timestamp())  # Mon 00:00 -05:00
    t = start + 300 * np.arange(days * 288, dtype=np.int64)
    hour = ((t - start) % 86400) / 3600.0
    dow = ((t - start) // 86400) % 7
    shape = (0.15 + np.exp(-0.5 * ((hour - 8) / 1.0) ** 2) + 0.9 * np.exp(-0.5 * ((hour - 17) / 1.3) ** 2)
             + 0.4 * np.exp(-0.5 * ((hour - 12.5) / 2.5) ** 2))
    shape = np.where(dow >= 5, 0.7 * (0.15 + 0.8 * np.exp(-0.5 * ((hour - 13) / 3) ** 2)), shape)
    for d in range(n_detectors):
        level = rng.uniform(5, 60)
        day_factor = rng.gamma(50, 1 / 50, size=days).repeat(288)
        yield f"B{d:04d}", t, rng.poisson(level * shape * day_factor)


def bench_fit(repeats: int) -> None:
    from service.pipeline import fit as fitting
    from service.stats import baseline as bl

    n_det, days = 1000, 56
    print(f"== fit: {n_det:,} detectors x {days} days of 5-minute counts "
          f"({n_det * days * 288 / 1e6:.1f} M counts) in SQLite, `tallyward fit --workers 2` path ==")
    with tempfile.TemporaryDirectory() as tmp:
        url = fresh_db(Path(tmp), "fit.db", n_det)
        conn = sqlite3.connect(url.removeprefix("sqlite:///"), isolation_level=None)
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("PRAGMA synchronous=OFF")
        t0 = time.perf_counter()
        sample = None
        for det, t, c in synthetic_history(n_det, days):
            conn.execute("BEGIN")
            conn.executemany("INSERT INTO counts VALUES (?, ?, ?, 0.0)",
                             zip([det] * t.size, t.tolist(), c.tolist(), strict=True))
            conn.execute("COMMIT")
            if sample is None:
                sample = (t, c)
        conn.close()
        print(f"  (setup: loaded in {time.perf_counter() - t0:.0f} s)")
        settings = Settings(database_url=url)
        engine = make_engine(settings)
        as_of = int(sample[0][-1]) + 300
        runs = []
        for _ in range(max(1, repeats - 1)):
            t0 = time.perf_counter()
            results = fitting.fit_many(settings, engine, as_of_s=as_of, workers=2,
                                       thresholds=False)
            runs.append(time.perf_counter() - t0)
            assert sum(r["status"] == "fitted" for r in results) == n_det
        t0 = time.perf_counter()
        fitting.fit_many(settings, engine, as_of_s=as_of, workers=2, thresholds=True)
        with_thresholds = time.perf_counter() - t0
        engine.dispose()
        pure = []
        for _ in range(20):
            t0 = time.perf_counter()
            bl.fit_baseline(sample[0], sample[1], interval_s=300, timezone="America/Chicago",
                            holiday_calendar="US", as_of_s=as_of)
            pure.append(time.perf_counter() - t0)
    total = statistics.median(runs)
    one = statistics.median(pure)
    print(f"  fit whole network     {total:>8.1f} s   (median of {len(runs)}: "
          + ", ".join(f"{x:.1f}" for x in runs) + "; target < 60 s; `tallyward fit --no-thresholds`)")
    print(f"  fit + thresholds      {with_thresholds:>8.1f} s   (`tallyward fit`: also derives every "
          "detector's scoring thresholds; target < 60 s)")
    print(f"  thresholds share      {(with_thresholds - total) / n_det * 1000:>8.1f} ms wall per "
          "detector with 2 processes (fit + thresholds minus fit)")
    print(f"  per detector          {total / n_det * 1000:>8.1f} ms wall with 2 processes")
    print(f"  pure fit, in memory   {one * 1000:>8.1f} ms per detector (median of 20, one core)")
    print(f"  ideal (pure fit / 2 cores) {one * n_det / 2:>5.1f} s; ratio {total / (one * n_det / 2):.2f}x")


def bench_score(repeats: int) -> None:
    import numpy as np
    from scipy import stats

    from service.pipeline import score as alerting
    from service.stats import baseline as bl
    from service.stats import calendar, capacity, timeline

    print("== score: timeline scorer vs bare vectorised scipy.stats tails on the same arrays ==")
    days = 56
    (det, t, c), = list(synthetic_history(1, days))
    as_of = int(t[0]) + 42 * 86400
    hist = t < as_of
    base = bl.fit_baseline(t[hist], c[hist], interval_s=300, timezone="America/Chicago",
                           holiday_calendar="US", as_of_s=as_of).baseline
    info = alerting.DetectorInfo(det, None, None, "arterial", 1, 300, "America/Chicago", "US", None)
    t0 = time.perf_counter()
    th = alerting.thresholds_for(base, info, Settings())
    th_s = time.perf_counter() - t0
    start = int(t[hist.sum()])
    n = 200_000
    grid = start + 300 * np.arange(n, dtype=np.int64)
    tg = calendar.local_time_grid(grid, interval_s=300, timezone="America/Chicago", holiday_calendar="US")
    mu, log_se, da, ia = base.expected_for(tg.day_type, tg.bin)
    rng = np.random.default_rng(3)
    y = rng.poisson(mu * rng.gamma(60, 1 / 60, n // 288 + 1).repeat(288)[:n])
    present = rng.random(n) > 0.005
    cap = capacity.capacity_cap("arterial", lanes=1, interval_s=300)
    ours, bare = [], []
    for _ in range(repeats):
        t0 = time.perf_counter()
        state = None
        for lo in range(0, n, 288):  # one day a call, carrying the warm state: steady state
            ev = timeline.score_timeline(int(grid[lo]), y[lo:lo + 288], present[lo:lo + 288],
                                         mu[lo:lo + 288], log_se[lo:lo + 288], da[lo:lo + 288],
                                         ia[lo:lo + 288], interval_s=300, cap=cap, thresholds=th,
                                         warm_state=state)
            state = ev.warm_state
        ours.append(n / (time.perf_counter() - t0))
        t0 = time.perf_counter()
        stats.poisson.sf(y - 1, mu)
        stats.poisson.cdf(y, mu)
        bare.append(n / (time.perf_counter() - t0))
    o, b = statistics.median(ours), statistics.median(bare)
    print(f"  timeline scorer        {o:>12,.0f} intervals/s (one-day chunks with warm state; "
          f"all six tests, level posterior, CUSUMs)")
    print(f"  bare scipy.stats tails {b:>12,.0f} intervals/s (poisson.sf + poisson.cdf only)")
    print(f"  ratio bare/scorer      {b / o:>12.1f}x")
    print(f"  thresholds from budget {th_s * 1000:>12.0f} ms per detector (once per baseline)")


def demo_database(folder: Path, *, until_s: int):  # type: ignore[no-untyped-def]
    """A SQLite file with the demo network's detectors and history, fitted as of ``until_s``."""
    from service.pipeline import fit as fitting
    from service.store.detectors import import_feature_collection
    from service.tools import networks

    feed = REPO / "seed_feed"
    url = f"sqlite:///{folder / 'demo.db'}"
    migrate.upgrade(url)
    settings = Settings(database_url=url, clock="data")
    engine = make_engine(settings)
    import_feature_collection(engine, orjson.loads((feed / "detectors.geojson").read_bytes()))
    networks.store_history(engine, networks.feed_history(feed / "counts.csv.gz", until_s=until_s))
    fitting.fit_many(settings, engine, as_of_s=until_s, workers=2)
    return url, settings, engine


def bench_score_db(repeats: int) -> None:
    """The database pass on the demo network: catch-up and an hour at a time."""
    from service.pipeline import ingest
    from service.pipeline import score as alerting

    feed = REPO / "seed_feed"
    net_start = parse_rfc3339("2026-11-16T00:00:00-06:00")
    print("== score (database pass): demo network, 60 detectors, SQLite ==")
    with tempfile.TemporaryDirectory() as tmp:
        url, settings, engine = demo_database(Path(tmp), until_s=net_start)
        rows = []
        from service.tools.replay import read_feed
        for _line, det, start, start_s, count in read_feed(feed / "counts.csv.gz"):
            if start_s >= net_start:
                rows.append((start_s, (len(rows), det, start, count)))
        hours: dict[int, list] = {}
        for start_s, item in rows:
            hours.setdefault(start_s // 3600, []).append(item)
        first_day = [h for h in sorted(hours)][:24]
        cache = alerting.ScoringCache()  # one scorer's cache for the whole run, as a Scorer keeps
        t_ingest = t_score = 0.0
        n = 0
        for h in first_day:
            t0 = time.perf_counter()
            ingest.ingest_items(engine, hours[h], future_tolerance_s=10**9,
                                after_store=alerting.mark_dirty)
            t1 = time.perf_counter()
            alerting.score_until_idle(engine, settings, cache=cache)
            t_score += time.perf_counter() - t1
            t_ingest += t1 - t0
            n += len(hours[h])
        print(f"  an hour at a time      {n / t_score:>10,.0f} intervals/s scored "
              f"({n:,} intervals over 24 passes; ingest {n / t_ingest:,.0f}/s)")
        rest = [item for h in sorted(hours)[24:] for item in hours[h]]
        for lo in range(0, len(rest), 10_000):
            ingest.ingest_items(engine, rest[lo:lo + 10_000], future_tolerance_s=10**9,
                                after_store=alerting.mark_dirty)
        t0 = time.perf_counter()
        alerting.score_until_idle(engine, settings, cache=cache)
        dt = time.perf_counter() - t0
        print(f"  catch-up (13 days)     {len(rest) / dt:>10,.0f} intervals/s scored "
              f"({len(rest):,} intervals in {dt:.1f} s)")
        engine.dispose()


def bench_latency(repeats: int) -> None:
    """Seconds from posting an interval to its alert being pollable, at ~200 counts/s."""
    feed = REPO / "seed_feed"
    truth = orjson.loads((feed / "truth.json").read_bytes())
    t01 = next(i for i in truth["injections"] if i["id"] == "T01")
    det = t01["detector_ids"][0]
    test_start = parse_rfc3339("2026-11-16T00:00:00-06:00")
    fault = parse_rfc3339(t01["start"])
    print(f"== alert latency: live server (inline scorer, data clock), ~200 counts/s, "
          f"demo fault {t01['id']} on {det} ==")
    with tempfile.TemporaryDirectory() as tmp:
        url, settings, engine = demo_database(Path(tmp), until_s=test_start)
        key = security.create_key(engine, name="lat", role="admin")
        engine.dispose()
        from service.tools.replay import read_feed
        by_start: dict[int, list[dict]] = {}
        for _l, d, start, start_s, count in read_feed(feed / "counts.csv.gz"):
            if fault - 3 * 3600 <= start_s < fault + 1800:
                by_start.setdefault(start_s, []).append(
                    {"detector_id": d, "start": start, "count": count})
        with serving(url, env={"TALLYWARD_CLOCK": "data"}) as (base, _proc):
            headers = {"Authorization": f"Bearer {key}"}
            posted: dict[int, float] = {}
            seen = None
            visible_at = 0.0
            with httpx.Client(base_url=base, headers=headers, timeout=30) as c:
                # Three hours of steady reporting before the fault, then the fault's start.
                for start_s in sorted(by_start):
                    items = by_start[start_s]
                    t0 = time.perf_counter()
                    c.post("/v1/counts", json={"counts": items})
                    posted[start_s] = time.perf_counter()
                    if start_s >= fault and seen is None:
                        r = c.get("/v1/alerts", params={"detector_id": det, "kind": "zero_counts"})
                        if r.json()["data"]:
                            seen, visible_at = r.json()["data"][0], time.perf_counter()
                    pause = len(items) / 200 - (time.perf_counter() - t0)
                    if pause > 0:
                        time.sleep(pause)
                deadline = time.perf_counter() + 30
                while seen is None and time.perf_counter() < deadline:
                    r = c.get("/v1/alerts", params={"detector_id": det, "kind": "zero_counts"})
                    if r.json()["data"]:
                        seen, visible_at = r.json()["data"][0], time.perf_counter()
                        break
                    time.sleep(0.05)
    if seen is None:
        print("  no alert seen")
        return
    start_s = parse_rfc3339(seen["start"])
    print(f"  alert {seen['kind']} from {seen['start']}: visible "
          f"{visible_at - posted[start_s]:.2f} s after that interval was posted "
          f"(target < 5 s); steady feed {sum(len(v) for v in by_start.values()) / len(by_start):.0f}"
          " counts per interval at 200 counts/s")


def _load_synthetic(folder: Path, n_det: int, days: int) -> tuple[str, int]:
    """A SQLite file with ``n_det`` detectors' synthetic 5-minute history; (URL, as_of)."""
    url = fresh_db(folder, "fitapi.db", n_det)
    conn = sqlite3.connect(url.removeprefix("sqlite:///"), isolation_level=None)
    as_of = 0
    for det, t, c in synthetic_history(n_det, days):
        conn.execute("BEGIN")
        conn.executemany("INSERT INTO counts VALUES (?, ?, ?, 0.0)",
                         zip([det] * t.size, t.tolist(), c.tolist(), strict=True))
        conn.execute("COMMIT")
        as_of = int(t[-1]) + 300
    conn.close()
    return url, as_of


def _api_fit(base: str, key: str, as_of: int, n_det: int) -> float:
    """POST /v1/baselines/fit and poll the job until done: wall seconds."""
    from service.timefmt import format_utc

    headers = {"Authorization": f"Bearer {key}"}
    with httpx.Client(base_url=base, headers=headers, timeout=60) as c:
        t0 = time.perf_counter()
        r = c.post("/v1/baselines/fit", json={"as_of": format_utc(as_of)})
        assert r.status_code == 202, r.text
        href = r.json()["href"]
        while True:
            job = c.get(href).json()
            if job["state"] == "done":
                break
            time.sleep(0.1)
        elapsed = time.perf_counter() - t0
    assert sum(x["status"] == "fitted" for x in job["results"]) == n_det, job["results"][:3]
    return elapsed


def bench_fit_api(repeats: int) -> None:
    """The same fits (with thresholds) by `tallyward fit` and through POST /v1/baselines/fit."""
    import os
    import subprocess

    from service.timefmt import format_utc

    n_det, days = 24, 56
    print(f"== fit through the API vs `tallyward fit`: {n_det} detectors x {days} days of "
          "5-minute counts, SQLite, thresholds derived, data clock ==")
    with tempfile.TemporaryDirectory() as tmp:
        url, as_of = _load_synthetic(Path(tmp), n_det, days)
        engine = make_engine(Settings(database_url=url))
        key = security.create_key(engine, name="fitapi", role="admin")
        engine.dispose()
        env = {**{k: v for k, v in os.environ.items() if not k.startswith("TALLYWARD_")},
               "TALLYWARD_DATABASE_URL": url, "TALLYWARD_CLOCK": "data",
               "TALLYWARD_LOG_LEVEL": "WARNING"}
        figures: dict[str, float] = {}
        for workers in (1, 2):
            t0 = time.perf_counter()
            subprocess.run([sys.executable, "-m", "service.cli", "fit", "--quiet", "--as-of",
                            format_utc(as_of), "--workers", str(workers)], cwd=REPO, env=env,
                           check=True, stdout=subprocess.DEVNULL)
            figures[f"cli{workers}"] = time.perf_counter() - t0
        with serving(url, env={"TALLYWARD_CLOCK": "data"}) as (base, _proc):
            figures["inline"] = _api_fit(base, key, as_of, n_det)
        with serving(url, env={"TALLYWARD_CLOCK": "data", "TALLYWARD_SCORING": "worker"}) \
                as (base, _proc):
            procs = [subprocess.Popen([sys.executable, "-m", "service.cli", "worker"], cwd=REPO,
                                      env={**env, "TALLYWARD_SCORING": "worker"},
                                      stderr=subprocess.DEVNULL) for _ in range(2)]
            try:
                figures["workers2"] = _api_fit(base, key, as_of, n_det)
            finally:
                for p in procs:
                    p.terminate()
                    p.wait(30)
    cli1, cli2 = figures["cli1"], figures["cli2"]
    print(f"  `tallyward fit --workers 1`          {cli1:>7.1f} s  ({cli1 / n_det * 1000:.0f} ms/detector,"
          " process start included)")
    print(f"  `tallyward fit --workers 2`          {cli2:>7.1f} s")
    print(f"  API, inline runner (one process)     {figures['inline']:>7.1f} s  "
          f"ratio to CLI --workers 1: {figures['inline'] / cli1:.2f}x")
    print(f"  API + 2 `tallyward worker` processes {figures['workers2']:>7.1f} s  "
          f"ratio to CLI --workers 2: {figures['workers2'] / cli2:.2f}x")


SECTIONS = {"ingest": bench_ingest, "fit": bench_fit, "score": bench_score,
            "score-db": bench_score_db, "latency": bench_latency, "fit-api": bench_fit_api}


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--only", choices=list(SECTIONS), action="append")
    p.add_argument("--repeats", type=int, default=3)
    args = p.parse_args()
    for name in args.only or list(SECTIONS):
        SECTIONS[name](args.repeats)


if __name__ == "__main__":
    main()
