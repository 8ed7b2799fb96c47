"""What the planners' figures cost (a measurement, not a test).

    .venv/bin/python bench/figures.py [--detectors 24] [--workers 2] [--repeat 5]

Builds a migrated SQLite file with DETECTORS detectors, each with a full local year (2026) of
5-minute counts (105,120 intervals; a seasonal level, weekday/weekend shapes, gamma day
factors, negative binomial intervals, 5 % of intervals and 2 % of days missing), fits one
baseline and stores it for every detector, then times:

* one detector's figures through the pipeline (read counts and flags, clean, impute, figures
  with 200 draws, AM/PM peaks): median and best of --repeat; the bare read of its counts as
  the baseline ratio;
* ``figures_many`` over all detectors on --workers processes (what ``tallyward figures``
  runs), and the time that rate gives for 1,000 detectors.

The machine is shared: the load average is printed beside the figures.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

import numpy as np  # noqa: E402
from sqlalchemy import insert, select  # noqa: E402

from service.config import Settings  # noqa: E402
from service.pipeline import figures as planning  # noqa: E402
from service.pipeline import fit as fitting  # noqa: E402
from service.store import migrations as migrate  # noqa: E402
from service.store import quality, tables  # noqa: E402
from service.store.engine import make_engine, read_transaction  # noqa: E402
from service.tools.networks import make_detector  # noqa: E402

YEAR = 2026
TZ_OFFSET_S = 6 * 3600  # America/Chicago standard time, for the simulated local clock
INTERVAL_S = 300


def year_counts(rng: np.random.Generator, start_s: int, end_s: int) -> tuple[np.ndarray, np.ndarray]:
    """Starts and counts of a simulated year (local clock approximated by standard time)."""
    t = np.arange(start_s, end_s, INTERVAL_S, dtype=np.int64)
    local = t - TZ_OFFSET_S
    day = (local - local[0]) // 86400
    hours = (local % 86400) / 3600.0
    dow = (local // 86400 + 3) % 7
    weekday = dow < 5
    shape = (0.15 + np.where(weekday, 1.2, 0.2) * np.exp(-0.5 * ((hours - 7.75) / 1.0) ** 2)
             + np.where(weekday, 1.5, 0.3) * np.exp(-0.5 * ((hours - 17.25) / 1.3) ** 2)
             + 0.6 * np.exp(-0.5 * ((hours - 12.5) / 3.0) ** 2))
    season = 1.0 + 0.12 * np.sin(2 * np.pi * (day - 100) / 365)
    n_days = int(day[-1]) + 1
    g = rng.gamma(100.0, 0.01, n_days)[day]
    lam = 30.0 * shape * np.where(weekday, 1.0, 0.7) * season * g
    counts = rng.poisson(lam * rng.gamma(1 / 0.03, 0.03, lam.size))
    keep = rng.random(t.size) >= 0.05
    lost = rng.choice(n_days, size=n_days // 50, replace=False)
    keep &= ~np.isin(day, lost)
    return t[keep], counts[keep]


def build(url: str, n: int) -> list[str]:
    migrate.upgrade(url)
    settings = Settings(database_url=url)
    engine = make_engine(settings)
    lo = int(datetime(YEAR, 1, 1, 6, tzinfo=UTC).timestamp())
    hi = int(datetime(YEAR + 1, 1, 1, 6, tzinfo=UTC).timestamp())
    rng = np.random.default_rng(5)
    ids = [f"bench-{i:04d}" for i in range(n)]
    for det in ids:
        make_detector(engine, det, group="BENCH")
        starts, counts = year_counts(rng, lo, hi)
        rows = [{"detector_id": det, "start_s": int(s), "count": int(c), "received_s": 0.0}
                for s, c in zip(starts, counts, strict=True)]
        with engine.begin() as conn:
            conn.execute(insert(tables.counts), rows)
    fitting.fit_one(engine, ids[0], as_of_s=hi, settings=settings, thresholds=False)
    b = tables.baselines
    with engine.begin() as conn:
        row = dict(conn.execute(select(b)).first()._mapping)
        row.pop("baseline_id")
        if len(ids) > 1:
            conn.execute(insert(b), [{**row, "detector_id": d} for d in ids[1:]])
    engine.dispose()
    return ids


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--detectors", type=int, default=24)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        url = f"sqlite:///{Path(tmp) / 'figures.db'}"
        started = time.perf_counter()
        ids = build(url, args.detectors)
        print(f"built {len(ids)} detectors x a year of 5-minute counts in "
              f"{time.perf_counter() - started:.0f} s")
        settings = Settings(database_url=url)
        engine = make_engine(settings)
        lo = int(datetime(YEAR, 1, 1, 6, tzinfo=UTC).timestamp())
        one, read, cpu = [], [], []
        for _ in range(args.repeat):
            t0 = time.perf_counter()
            with read_transaction(engine) as conn:
                starts, _ = quality.count_arrays(conn, ids[0], from_s=lo, until_s=lo + 366 * 86400)
            read.append(time.perf_counter() - t0)
            t0, c0 = time.perf_counter(), time.process_time()
            fig = planning.figures(engine, [ids[0]], year=YEAR)
            one.append(time.perf_counter() - t0)
            cpu.append(time.process_time() - c0)
        print(f"one detector, {starts.size:,} stored counts of 105,120 intervals: figures "
              f"median {statistics.median(one):.3f} s, best {min(one):.3f} s (target < 1 s); "
              f"bare read of the counts {statistics.median(read):.3f} s "
              f"(ratio {statistics.median(one) / statistics.median(read):.1f}x)")
        per_cpu = statistics.median(cpu)
        print(f"  CPU time {per_cpu:.3f} s a detector (the load-independent cost): 1,000 "
              f"detectors on 2 free cores would take about {1000 * per_cpu / 2:.0f} s")
        print(f"  AADT {fig['aadt']['value']} ({fig['aadt']['low']}..{fig['aadt']['high']}), "
              f"K30 {fig['k30']['value']}, imputed share {fig['imputed_share']}")
        t0 = time.perf_counter()
        report = planning.figures_many(settings, engine, ids, year=YEAR, workers=args.workers)
        many = time.perf_counter() - t0
        failed = sum("error" in r for r in report)
        per = many / len(ids)
        print(f"{len(ids)} detectors on {args.workers} workers: {many:.1f} s "
              f"({per:.3f} s a detector, {failed} without figures); at that rate 1,000 "
              f"detectors take {1000 * per:.0f} s (target < 120 s)")
        print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
        engine.dispose()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
