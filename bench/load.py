"""Load benchmark: a state-sized network on PostgreSQL, and the same run on SQLite.

    .venv/bin/python bench/load.py                       # the full run: 10,000 + 500 detectors
    .venv/bin/python bench/load.py --detectors 500 --weeks 2 --feed-hours 1   # a reduced scale

What it does, per database (PostgreSQL first, then SQLite unless --skip-sqlite):

1. Registers ``--detectors`` 5-minute detectors (groups of four) and ``--short`` 20-second
   freeway detectors (default: 5 % of ``--detectors``), in the invented city of Marrowick.
2. Loads ``--weeks`` of history: the first ``--ingest-hours`` through the product's ingest
   (``ingest_items``, the path of ``tallyward import-counts``), the rest in bulk (``COPY`` on
   PostgreSQL), detector by detector a day at a time; prints both rates. On PostgreSQL the counts
   partitions are made first by ``maintain_storage``, as a deployment's maintenance would.
3. Fits every baseline with its scoring thresholds (``fit_many``, 2 processes), at a tenth,
   a half and all of the network, so that linear growth shows.
4. Stores ``--alerts`` alerts (100,000 by default) for the polling figure.
5. Feeds ``--feed-hours`` more at ``--speed`` times real time through the HTTP API: on
   PostgreSQL 2 API processes (``tallyward serve --workers 2``, ``TALLYWARD_SCORING=worker``)
   and 2 ``tallyward worker`` processes sharing the scoring; on SQLite one API process
   scoring inline. Every 5 minutes of data time is posted in 1,000-count batches
   by two client threads. Prints the sustained ingest rate, the scoring lag (per detector
   and 5-minute slot: seconds from the slot's last batch committed to the detector's
   ``scored_through_s`` passing the slot), alert polling latency (caught-up polls and pages
   of 100) and ``GET /v1/health`` latency, and the database size per million counts.

The scoring clock is the data clock (``TALLYWARD_CLOCK=data``), as for any replay of history.
A script, not a test: it prints figures; run it on a quiet machine.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from concurrent.futures import ThreadPoolExecutor
from datetime import UTC, datetime
from pathlib import Path
from zoneinfo import ZoneInfo

import httpx
import numpy as np
import orjson
from sqlalchemy import text
from sqlalchemy.engine import make_url

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from service.config import Settings  # noqa: E402
from service.pipeline import fit as fitting  # noqa: E402
from service.pipeline import ingest  # noqa: E402
from service.pipeline.retention import maintain_storage  # noqa: E402
from service.store import keys as security  # noqa: E402
from service.store import migrations as migrate  # noqa: E402
from service.store import tables  # noqa: E402
from service.store.alerts import next_seqs  # noqa: E402
from service.store.engine import make_engine, write_transaction  # noqa: E402
from service.store.scoring import vacuum_hot_tables  # noqa: E402
from service.store.scratch import scratch_database  # noqa: E402
from service.timefmt import format_utc  # noqa: E402

DAY_S = 86_400
SLOT_S = 300  # data seconds posted together (one 5-minute interval of the network)
BATCH = 1000
# Monday 2026-09-07 00:00 America/Chicago: the history starts here.
START_S = int(datetime(2026, 9, 7, 5, 0, tzinfo=UTC).timestamp())


# ----------------------------------------------------------------------------- the network


ZONE = ZoneInfo("America/Chicago")


def local_offsets(t: np.ndarray) -> np.ndarray:
    """UTC offset (seconds) of Central time at each epoch second of ``t`` (DST included)."""
    hours = t // 3600
    unique, index = np.unique(hours, return_inverse=True)
    offsets = np.array([int(datetime.fromtimestamp(int(h) * 3600, ZONE).utcoffset()
                            .total_seconds()) for h in unique])
    return offsets[index]


def profile(step_s: int, n_days: int, start_s: int) -> np.ndarray:
    """Vehicles per ``step_s`` for a unit detector at each interval of ``n_days`` (two peaks,
    lighter weekends), on Central local time as the detectors are registered."""
    t = np.arange(start_s, start_s + n_days * DAY_S, step_s)
    local = t + local_offsets(t)
    hour = (local % DAY_S) / 3600.0
    weekday = ((local // DAY_S) + 3) % 7  # 1970-01-01 was a Thursday
    per_hour = 80 + 900 * np.exp(-((hour - 8) ** 2) / 3) + 1000 * np.exp(-((hour - 17) ** 2) / 4)
    per_hour = np.where(weekday >= 5, 0.6 * per_hour, per_hour)
    return per_hour * step_s / 3600.0


class Network:
    def __init__(self, n_long: int, n_short: int, seed: int = 11) -> None:
        rng = np.random.default_rng(seed)
        self.long_ids = [f"MW-{i:05d}" for i in range(n_long)]
        self.short_ids = [f"MW-FWY-{i:04d}" for i in range(n_short)]
        self.long_scale = rng.lognormal(0, 0.5, n_long)
        self.short_scale = rng.lognormal(0.5, 0.3, n_short)
        self.rng = rng

    def register(self, engine) -> None:  # type: ignore[no-untyped-def]
        now = time.time()
        rows = [{"detector_id": d, "label": None, "group_id": f"MW-G{i // 4:05d}",
                 "road_class": "arterial", "lanes": 2, "interval_s": 300,
                 "timezone": "America/Chicago", "holiday_calendar": None, "lon": None,
                 "lat": None, "capacity_per_lane_h": None, "created_s": now, "updated_s": now}
                for i, d in enumerate(self.long_ids)]
        rows += [{"detector_id": d, "label": None, "group_id": None, "road_class": "freeway",
                  "lanes": 1, "interval_s": 20, "timezone": "America/Chicago",
                  "holiday_calendar": None, "lon": None, "lat": None,
                  "capacity_per_lane_h": None, "created_s": now, "updated_s": now}
                 for d in self.short_ids]
        with write_transaction(engine) as conn:
            for i in range(0, len(rows), 5000):
                conn.execute(tables.detectors.insert(), rows[i : i + 5000])

    def items(self, lo_s: int, hi_s: int) -> list[tuple[str, int, int]]:
        """(detector, start_s, count) of every interval starting in [lo_s, hi_s), time order."""
        days = max(1, -(-(hi_s - lo_s) // DAY_S))
        out: list[tuple[str, int, int]] = []
        for ids, scale, step in ((self.long_ids, self.long_scale, 300),
                                 (self.short_ids, self.short_scale, 20)):
            if not ids:
                continue
            mu = profile(step, days, lo_s)[: (hi_s - lo_s) // step]
            counts = self.rng.poisson(np.outer(mu, scale))
            starts = lo_s + step * np.arange(mu.size)
            for k, t in enumerate(starts.tolist()):
                row = counts[k].tolist()
                out.extend((d, t, c) for d, c in zip(ids, row, strict=True))
        out.sort(key=lambda r: r[1])
        return out


# ----------------------------------------------------------------------------- steps


def day_arrays(network: Network, lo_s: int) -> tuple[list[str], np.ndarray, np.ndarray]:
    """One day of history from ``lo_s`` as (ids, detector index, start_s, count) arrays in
    (detector, start) order: the order of an export of past counts, detector by detector."""
    ids = network.long_ids + network.short_ids
    det_parts, start_parts, count_parts = [], [], []
    offset = 0
    for kind_ids, scale, step in ((network.long_ids, network.long_scale, 300),
                                  (network.short_ids, network.short_scale, 20)):
        if kind_ids:
            mu = profile(step, 1, lo_s)
            counts = network.rng.poisson(np.outer(scale, mu))  # detector-major
            det_parts.append(np.repeat(np.arange(offset, offset + len(kind_ids)), mu.size))
            start_parts.append(np.tile(lo_s + step * np.arange(mu.size), len(kind_ids)))
            count_parts.append(counts.ravel())
        offset += len(kind_ids)
    return ids, np.concatenate(det_parts), np.concatenate(start_parts), np.concatenate(count_parts)


def load_history(engine, network: Network, *, weeks: int,  # type: ignore[no-untyped-def]
                 ingest_hours: float) -> dict:
    """History: the first ``ingest_hours`` through the product's ingest (``ingest_items``,
    the path of ``tallyward import-counts`` and ``POST /v1/counts``), for its rate; the rest
    bulk-loaded (PostgreSQL ``COPY``, SQLite ``executemany``) one day at a time, detector by
    detector, for time. Ingest stores nothing but rows of ``counts`` for new intervals, so
    both give the same table."""
    out = {"ingest_counts": 0, "ingest_s": 0.0, "bulk_counts": 0, "bulk_s": 0.0}
    first = START_S + int(ingest_hours * 3600) // SLOT_S * SLOT_S
    started = time.perf_counter()
    rows = network.items(START_S, first)
    chunk = [(i, d, format_utc(t), c) for i, (d, t, c) in enumerate(rows)]
    for i in range(0, len(chunk), 20_000):
        result = ingest.ingest_items(engine, chunk[i : i + 20_000], future_tolerance_s=10**12)
        assert not result.rejected, result.to_dict()
    out["ingest_counts"], out["ingest_s"] = len(chunk), time.perf_counter() - started
    print(f"  product ingest: {len(chunk):,} counts, "
          f"{len(chunk) / out['ingest_s']:,.0f} counts/s", file=sys.stderr)
    pg = engine.dialect.name == "postgresql"

    def build(day: int) -> tuple[object, int]:
        """One day's rows, ready to send: COPY text on PostgreSQL, tuples on SQLite."""
        ids, det, start, count = day_arrays(network, START_S + day * DAY_S)
        keep = start >= first
        rows = zip(det[keep].tolist(), start[keep].tolist(), count[keep].tolist(), strict=True)
        if pg:
            return "".join(f"{ids[d]}\t{t}\t{c}\t{t + 60}\n" for d, t, c in rows), int(keep.sum())
        return [(ids[d], t, c, float(t + 60)) for d, t, c in rows], int(keep.sum())

    started = time.perf_counter()
    total = 0
    # The next day is built while the database takes the current one.
    with ThreadPoolExecutor(max_workers=1) as builder:
        pending = builder.submit(build, 0)
        for day in range(weeks * 7):
            payload, n = pending.result()
            if day + 1 < weeks * 7:
                pending = builder.submit(build, day + 1)
            raw = engine.raw_connection()
            try:
                cur = raw.cursor()
                if pg:
                    # No statement timeout for a bulk copy; foreign-key triggers off (superuser
                    # only; the ids are the registered ones), as a data-only restore with
                    # triggers disabled does.
                    cur.execute("SET LOCAL statement_timeout = 0")
                    try:
                        cur.execute("SET LOCAL session_replication_role = replica")
                    except Exception:  # noqa: BLE001 - not a superuser: copy with checks on
                        raw.rollback()
                        cur.execute("SET LOCAL statement_timeout = 0")
                    with cur.copy("COPY counts (detector_id, start_s, count, received_s) "
                                  "FROM STDIN") as copy:
                        copy.write(payload)
                else:
                    cur.executemany("INSERT INTO counts (detector_id, start_s, count, "
                                    "received_s) VALUES (?, ?, ?, ?)", payload)
                raw.commit()
            finally:
                raw.close()
            total += n
            elapsed = time.perf_counter() - started
            print(f"  bulk day {day + 1}/{weeks * 7}: {total:,} counts, "
                  f"{total / elapsed:,.0f} counts/s", file=sys.stderr)
    out["bulk_counts"], out["bulk_s"] = total, time.perf_counter() - started
    if pg:
        with engine.connect() as conn:
            conn = conn.execution_options(isolation_level="AUTOCOMMIT")
            conn.exec_driver_sql("SET statement_timeout = 0")
            conn.exec_driver_sql("ANALYZE counts")
    return out


def fit_network(settings: Settings, engine, ids: list[str], *, as_of_s: int,  # type: ignore[no-untyped-def]
                fractions: list[float]) -> list[tuple[int, float, int]]:
    """Fit with thresholds at growing subsets; (detectors, seconds, fitted) each."""
    out = []
    for frac in fractions:
        subset = ids[: max(1, int(round(len(ids) * frac)))]
        started = time.perf_counter()
        results = fitting.fit_many(settings, engine, detector_ids=subset, as_of_s=as_of_s,
                                   workers=2, thresholds=True)
        out.append((len(subset), time.perf_counter() - started,
                    sum(r["status"] == "fitted" for r in results)))
        print(f"  fit {len(subset):,}: {out[-1][1]:.1f} s", file=sys.stderr)
    return out


def store_alerts(engine, ids: list[str], n: int, *, before_s: int) -> None:  # type: ignore[no-untyped-def]
    """``n`` closed alerts (distinct detector, kind, start) ending before ``before_s``."""
    now = time.time()
    with write_transaction(engine) as conn:
        seqs = next_seqs(conn, n)
        rows = []
        for k, seq in enumerate(seqs):
            det = ids[k % len(ids)]
            start = before_s - DAY_S * 30 - (k // len(ids)) * 3600
            rows.append({"seq": seq, "subject": det, "detector_id": det, "group_id": None,
                         "kind": "low_volume", "cause": "unknown", "status": "closed",
                         "withdrawn": 0, "start_s": start, "end_s": start + 900,
                         "closed_s": start + 1200, "observed": 3.0, "expected": 20.0,
                         "log_p": -12.0, "n_intervals": 4, "detectors": None, "part_of": None,
                         "baseline_id": None, "summary": "benchmark alert",
                         "created_s": now, "updated_s": now})
            if len(rows) == 5000:
                conn.execute(tables.alerts.insert(), rows)
                rows = []
        if rows:
            conn.execute(tables.alerts.insert(), rows)


def percentile(values: list[float], q: float) -> float:
    return float(np.percentile(np.asarray(values), q)) if values else float("nan")


def start(cmd: list[str], env: dict[str, str], log: Path) -> subprocess.Popen[bytes]:
    return subprocess.Popen([sys.executable, "-m", "service.cli", *cmd], cwd=REPO, env=env,
                            stdout=subprocess.DEVNULL, stderr=open(log, "ab"))  # noqa: SIM115


def feed(url: str, engine, network: Network, *, from_s: int, hours: float, speed: float,  # type: ignore[no-untyped-def]
         api_workers: int, scorers: int, scoring: str, key: str, logdir: Path) -> dict:
    """Post ``hours`` of data at ``speed`` x real time through the API; measure lag etc."""
    port = 20000 + os.getpid() % 20000
    env = {**{k: v for k, v in os.environ.items() if not k.startswith("TALLYWARD_")},
           "TALLYWARD_DATABASE_URL": url, "TALLYWARD_CLOCK": "data",
           "TALLYWARD_SCORING": scoring, "TALLYWARD_LOG_LEVEL": "WARNING",
           "TALLYWARD_FUTURE_TOLERANCE_S": str(10**9)}
    procs = [start(["serve", "--port", str(port), "--workers", str(api_workers)], env,
                   logdir / "api.log")]
    # TALLYWARD_REFITS=off: a nightly refit in the fed hours would only add noise here.
    procs += [start(["worker"], {**env, "TALLYWARD_WORKER_POLL_S": "0.2",
                                 "TALLYWARD_REFITS": "off"}, logdir / f"worker{i}.log")
              for i in range(scorers)]
    base = f"http://127.0.0.1:{port}"
    headers = {"Authorization": f"Bearer {key}", "Content-Type": "application/json"}
    try:
        for _ in range(600):
            try:
                httpx.get(base + "/v1/health", headers=headers, timeout=2)
                break
            except httpx.HTTPError:
                time.sleep(0.1)
        return _feed_and_measure(base, headers, engine, network, from_s=from_s, hours=hours,
                                 speed=speed)
    finally:
        for p in procs:
            p.terminate()
        for p in procs:
            try:
                p.wait(20)
            except subprocess.TimeoutExpired:
                p.kill()
        # The processes' warnings and errors (the logs go with the temporary folder).
        for log in sorted(logdir.glob("*.log")):
            lines = [ln for ln in log.read_text(errors="replace").splitlines()
                     if '"level":"warning"' in ln or '"level":"error"' in ln
                     or "Traceback" in ln]
            if lines:
                print(f"  {log.name}: {len(lines)} warning/error lines, first: "
                      f"{lines[0][:400]}", file=sys.stderr)


def _feed_and_measure(base: str, headers: dict, engine, network: Network, *, from_s: int,  # type: ignore[no-untyped-def]
                      hours: float, speed: float) -> dict:
    slots = int(hours * 3600 // SLOT_S)
    slot_wall = SLOT_S / speed
    committed: dict[int, float] = {}  # slot end (data s) -> wall time its last batch returned
    lags: list[float] = []
    posted = 0
    busy = 0.0
    late_slots = 0
    stop = threading.Event()
    n_det = len(network.long_ids) + len(network.short_ids)

    def watch() -> None:
        seen: dict[str, int] = {}
        tidied = 0.0
        with engine.connect() as conn:
            while not stop.is_set():
                now = time.time()
                try:
                    rows = conn.execute(text(
                        "SELECT detector_id, scored_through_s FROM detector_state")).all()
                finally:
                    conn.rollback()
                for det, through in rows:
                    if through is None:
                        continue
                    prev = seen.get(det, from_s)
                    # Only slots already committed count: a detector scored past a slot
                    # before the slot's last batch returned is counted when that batch has
                    # returned, with the lag the watcher sees then (at most its 0.5 s tick).
                    covered = [(end, at) for end, at in list(committed.items())
                               if prev < end <= through]
                    for _end, at in covered:
                        lags.append(max(0.0, now - at))
                    if covered:
                        seen[det] = max(end for end, _ in covered)
                if time.time() - tidied > 60:
                    # What `tallyward maintain` does for these tables every few minutes (this
                    # server runs with autovacuum off; see vacuum_hot_tables).
                    vacuum_hot_tables(engine)
                    tidied = time.time()
                time.sleep(0.5)

    watcher = threading.Thread(target=watch, daemon=True)
    watcher.start()
    t0 = time.time()
    clients = [httpx.Client(headers=headers, timeout=120) for _ in range(2)]
    for s in range(slots):
        lo = from_s + s * SLOT_S
        rows = network.items(lo, lo + SLOT_S)
        bodies = [orjson.dumps({"counts": [{"detector_id": d, "start": format_utc(t), "count": c}
                                          for d, t, c in rows[i : i + BATCH]]})
                  for i in range(0, len(rows), BATCH)]
        began = time.time()
        errors: list[str] = []

        def send(part: list[bytes], client: httpx.Client,
                 errors: list[str] = errors) -> None:
            for body in part:
                r = client.post(base + "/v1/counts", content=body)
                if r.status_code >= 300:
                    errors.append(f"{r.status_code} {r.text[:200]}")

        threads = [threading.Thread(target=send, args=(bodies[k::2], clients[k]))
                   for k in range(2)]
        for th in threads:
            th.start()
        for th in threads:
            th.join()
        if errors:
            raise RuntimeError(f"ingest failed: {errors[:3]}")
        done = time.time()
        committed[lo + SLOT_S] = done
        posted += len(rows)
        busy += done - began
        deadline = t0 + (s + 1) * slot_wall
        if done > deadline:
            late_slots += 1
        else:
            time.sleep(deadline - done)
    feed_wall = time.time() - t0
    # Wait for scoring to catch up (at most 5 minutes), then stop watching.
    expected = slots * n_det
    wait_until = time.time() + 300
    while len(lags) < expected and time.time() < wait_until:
        time.sleep(1)
    stop.set()
    watcher.join(5)
    # What was left unscored, and why: the detectors short of the last slot, by interval, and
    # those whose scoring failed (their errors are in the workers' logs, printed below).
    last_end = from_s + slots * SLOT_S
    with engine.connect() as conn:
        behind = dict(conn.execute(text(
            "SELECT d.interval_s, count(*) FROM detector_state s JOIN detectors d "
            "USING (detector_id) WHERE s.scored_through_s IS NULL OR s.scored_through_s < :end "
            "GROUP BY d.interval_s"), {"end": last_end}).all())
        failing = int(conn.execute(text(
            "SELECT count(*) FROM detector_state WHERE failures > 0")).scalar_one())

    polls, pages, health = [], [], []
    client = clients[0]
    with engine.connect() as conn:
        high = int(conn.execute(text(
            "SELECT value FROM counters WHERE name = 'alert_seq'")).scalar_one())
    rng = np.random.default_rng(1)
    for _ in range(200):
        t = time.perf_counter()
        client.get(base + "/v1/alerts", params={"after": high})
        polls.append(time.perf_counter() - t)
        t = time.perf_counter()
        client.get(base + "/v1/alerts", params={"after": int(rng.integers(0, high)),
                                                "limit": 100})
        pages.append(time.perf_counter() - t)
    for _ in range(100):
        t = time.perf_counter()
        client.get(base + "/v1/health")
        health.append(time.perf_counter() - t)
    for c in clients:
        c.close()
    return {"posted": posted, "feed_wall_s": feed_wall, "busy_s": busy, "late_slots": late_slots,
            "slots": slots, "lags": lags, "expected_lags": expected, "polls": polls,
            "pages": pages, "health": health, "alerts_high_seq": high,
            "behind": behind, "failing": failing}


def db_size_bytes(url: str, engine) -> int:  # type: ignore[no-untyped-def]
    if url.startswith("sqlite"):
        path = make_url(url).database
        return sum(os.path.getsize(p) for p in (path, path + "-wal") if os.path.exists(p))
    with engine.connect() as conn:
        return int(conn.execute(text("SELECT pg_database_size(current_database())")).scalar())


# ----------------------------------------------------------------------------- one run


def run(url: str, args: argparse.Namespace, *, label: str, api_workers: int, scorers: int,
        scoring: str, logdir: Path) -> dict:
    print(f"== {label}", file=sys.stderr)
    migrate.upgrade(url)
    feed_days = int(np.ceil(args.feed_hours / 24)) + 1
    settings = Settings(database_url=url, clock="data", scoring="off",
                        partition_ahead_days=args.weeks * 7 + feed_days + 7)
    engine = make_engine(settings)
    maintain_storage(engine, settings, START_S)  # partitions ahead (PostgreSQL)
    n_short = args.short if args.short is not None else args.detectors // 20
    network = Network(args.detectors, n_short)
    if args.loaded:
        # A database this script loaded with the same --detectors, --short and --weeks, kept
        # (for instance after a run was stopped): fit and feed again without reloading.
        hist = {"ingest_counts": 0, "ingest_s": 0.0, "bulk_counts": 0, "bulk_s": 0.0}
        with engine.connect() as conn:
            conn.execute(text("DELETE FROM api_keys WHERE name LIKE 'load-%'"))
            conn.commit()
    else:
        network.register(engine)
        hist = load_history(engine, network, weeks=args.weeks, ingest_hours=args.ingest_hours)
    as_of = START_S + args.weeks * 7 * DAY_S
    ids = network.long_ids + network.short_ids
    np.random.default_rng(3).shuffle(ids)  # subsets hold both kinds in proportion
    fractions = [float(f) for f in args.fit_fractions.split(",")]
    if args.skip_fit:  # --loaded with baselines and alerts stored by an earlier run
        fits = []
    else:
        fits = fit_network(settings, engine, ids, as_of_s=as_of, fractions=fractions)
        store_alerts(engine, network.long_ids, args.alerts, before_s=as_of)
    key = security.create_key(engine, name=f"load-{uuid.uuid4().hex[:6]}", role="admin")
    # Scoring state starts at as_of: the feed is what gets scored.
    fed = feed(url, engine, network, from_s=as_of + int(args.feed_after_hours * 3600), hours=args.feed_hours, speed=args.speed,
               api_workers=api_workers, scorers=scorers, scoring=scoring, key=key,
               logdir=logdir)
    n_counts = hist["ingest_counts"] + hist["bulk_counts"] + fed["posted"]
    if args.loaded:  # the planner's row estimate of every partition (ANALYZE ran at load)
        with engine.connect() as conn:
            n_counts = int(conn.execute(text(
                "SELECT sum(reltuples) FROM pg_class WHERE relname LIKE 'counts_p%' "
                "AND relkind = 'r'")).scalar() or 0) + fed["posted"]
    size = db_size_bytes(url, engine)
    engine.dispose()
    return {"label": label, "detectors": len(ids), "short": n_short, "history": hist,
            "fits": fits, "fed": fed, "counts": n_counts, "size": size}


def report(r: dict, args: argparse.Namespace) -> None:
    fed = r["fed"]
    lags = fed["lags"]
    print(f"\n### {r['label']}: {r['detectors']:,} detectors ({r['short']:,} at 20 s), "
          f"{args.weeks} weeks of history, {args.feed_hours} h fed at {args.speed:g}x")
    h = r["history"]
    if h["ingest_counts"] or h["bulk_counts"]:
        print(f"history load, product ingest (in process, first {args.ingest_hours:g} h): "
              f"{h['ingest_counts']:,} counts in {h['ingest_s']:.1f} s = "
              f"{h['ingest_counts'] / h['ingest_s']:,.0f} counts/s")
        print(f"history load, bulk (COPY / executemany, detector by detector): "
              f"{h['bulk_counts']:,} counts in {h['bulk_s']:.1f} s = "
              f"{h['bulk_counts'] / max(h['bulk_s'], 1e-9):,.0f} counts/s")
    else:
        print("history load: not measured in this run (--loaded: an earlier run's database)")
    for n, secs, fitted in r["fits"]:
        print(f"fit with thresholds, 2 processes: {n:,} detectors in {secs:.1f} s "
              f"({1000 * secs / n:.1f} ms per detector; {fitted:,} fitted)")
    if fed["slots"]:  # --feed-hours 0 measures only the polls and health
        offered = fed["posted"] / (fed["slots"] * SLOT_S / args.speed)
        print(f"ingest: {fed['posted']:,} counts over {fed['feed_wall_s']:.1f} s wall "
              f"(offered {offered:,.0f} counts/s at {args.speed:g}x; posting busy "
              f"{fed['busy_s']:.1f} s = {fed['posted'] / max(fed['busy_s'], 1e-9):,.0f} counts/s "
              f"while posting; {fed['late_slots']} of {fed['slots']} slots late)")
        print(f"scoring lag (commit -> scored), {len(lags):,} of {fed['expected_lags']:,} "
              f"detector-slots scored: median {percentile(lags, 50):.1f} s, "
              f"p99 {percentile(lags, 99):.1f} s")
        behind = ", ".join(f"{n:,} at {step} s" for step, n in sorted(fed["behind"].items()))
        print(f"after the feed: detectors short of the last slot: {behind or 'none'}; "
              f"detectors failing: {fed['failing']:,}")
    print(f"alert polls with {fed['alerts_high_seq']:,} alert changes stored: caught-up p99 "
          f"{1000 * percentile(fed['polls'], 99):.1f} ms (median "
          f"{1000 * statistics.median(fed['polls']):.1f}); page of 100 p99 "
          f"{1000 * percentile(fed['pages'], 99):.1f} ms")
    print(f"GET /v1/health: median {1000 * statistics.median(fed['health']):.1f} ms, "
          f"p99 {1000 * percentile(fed['health'], 99):.1f} ms")
    print(f"database: {r['size'] / 1e6:,.0f} MB for {r['counts']:,} counts = "
          f"{r['size'] / 1e6 / (r['counts'] / 1e6):,.0f} MB per million counts "
          "(with alerts, baselines, evidence and indexes)")


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--detectors", type=int, default=10_000, help="5-minute detectors")
    p.add_argument("--short", type=int, default=None,
                   help="20-second detectors (default: 5%% of --detectors, 500 at 10,000)")
    p.add_argument("--weeks", type=int, default=8, help="weeks of history")
    p.add_argument("--ingest-hours", type=float, default=6.0,
                   help="hours of history loaded through the product's ingest (the rest in bulk)")
    p.add_argument("--feed-hours", type=float, default=24.0, help="data hours fed live")
    p.add_argument("--speed", type=float, default=10.0, help="times real time")
    p.add_argument("--alerts", type=int, default=100_000, help="alerts stored before polling")
    p.add_argument("--fit-fractions", default="0.1,0.5,1",
                   help="fit at these shares of the network (1,000 / 5,000 / 10,000 at full)")
    p.add_argument("--pg", default="postgresql+psycopg://postgres@127.0.0.1:5432/postgres",
                   help="a PostgreSQL server URL; a throw-away database is made on it")
    p.add_argument("--loaded", metavar="URL",
                   help="reuse a PostgreSQL database an earlier run of this script loaded with "
                   "the same --detectors/--short/--weeks (kept, not dropped): fit and feed only")
    p.add_argument("--skip-fit", action="store_true",
                   help="with --loaded: keep the baselines and alerts stored by the earlier run")
    p.add_argument("--feed-after-hours", type=float, default=0.0,
                   help="with --loaded: start the feed this many hours after the history ends "
                   "(where an earlier feed on the same database stopped)")
    p.add_argument("--skip-pg", action="store_true")
    p.add_argument("--skip-sqlite", action="store_true")
    args = p.parse_args()
    results = []
    with tempfile.TemporaryDirectory(prefix="tallyward-load-") as tmp:
        logdir = Path(tmp)
        if not args.skip_pg:
            label = "PostgreSQL, 2 API processes + 2 workers"
            if args.loaded:
                results.append(run(args.loaded, args, label=label, api_workers=2, scorers=2,
                                   scoring="worker", logdir=logdir))
            else:
                with scratch_database(args.pg, "tallyward_load", migrate=False) as url:
                    results.append(run(url, args, label=label, api_workers=2, scorers=2,
                                       scoring="worker", logdir=logdir))
        if not args.skip_sqlite:
            url = f"sqlite:///{logdir / 'load.db'}"
            results.append(run(url, args, label="SQLite, 1 API process scoring inline",
                               api_workers=1, scorers=0, scoring="inline", logdir=logdir))
        for r in results:
            report(r, args)
        print(f"\nmachine: {os.cpu_count()} cores; load average at the end "
              f"{os.getloadavg()[0]:.1f}; {datetime.now(UTC):%Y-%m-%d %H:%M} UTC")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
