"""`tallyward worker` beside `tallyward serve` on PostgreSQL, as real processes.

The API (``TALLYWARD_SCORING=worker``) only stores counts; separate worker processes score
them, sharing the work through the database. A worker killed in the middle of a pass loses
nothing: its claims expire and another worker scores the same intervals, with the same alerts
as one uninterrupted scorer (checked against a reference run on a SQLite file).
"""

from __future__ import annotations

import calendar
import json
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx
import pytest
from sqlalchemy import select

from service.config import Settings
from service.pipeline import fit as fitting
from service.pipeline import ingest
from service.pipeline.score import mark_dirty, score_until_idle
from service.store import migrations as migrate
from service.store import tables
from service.store.engine import make_engine, read_transaction
from service.tools.networks import serving
from tests.conftest import PG_URL, REPO, auth
from tests.factories import load_network, small_network

pytestmark = [pytest.mark.slow,
              pytest.mark.skipif(not PG_URL, reason="TALLYWARD_TEST_DATABASE_URL not set")]

DETS = ("bra3-nb-lt", "bra3-nb-t1", "bra3-nb-t2")
DEAD = "bra3-nb-t1"
ALERT_WAIT_S = 5.0  # the promise: an alert can be polled within 5 s of its counts' commit
TAKEOVER_WAIT_S = 180.0  # a bound on waiting for the second worker, not a speed requirement
SERVER_START_S = 180.0  # a bound on the API's start on a busy machine
LEASE_S = 5  # TALLYWARD_WORKER_LEASE_S for these workers: a dead worker's claims expire fast


class WorkerProcess:
    """``tallyward worker`` as a subprocess; stderr to a file (a full pipe would stall it)."""

    def __init__(self, env: dict[str, str]) -> None:
        self.log = tempfile.TemporaryFile()
        self.proc = subprocess.Popen([sys.executable, "-m", "service.cli", "worker"], cwd=REPO,
                                     env=env, stdout=subprocess.DEVNULL, stderr=self.log)

    def stderr(self) -> str:
        self.log.seek(0)
        return self.log.read().decode(errors="replace")

    def wait_started(self) -> None:
        deadline = time.monotonic() + SERVER_START_S
        while "tallyward worker starting" not in self.stderr():
            assert self.proc.poll() is None, self.stderr()
            assert time.monotonic() < deadline, self.stderr()
            time.sleep(0.05)

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(15)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)


@pytest.fixture
def database_url(database_url: str) -> str:  # type: ignore[override]
    """PostgreSQL only: SKIP LOCKED claims shared by worker processes."""
    if not database_url.startswith("postgresql"):
        pytest.skip("worker processes sharing claims: PostgreSQL")
    return database_url


def env_for(database_url: str) -> dict[str, str]:
    return {**{k: v for k, v in os.environ.items() if not k.startswith("TALLYWARD_")},
            "TALLYWARD_DATABASE_URL": database_url, "TALLYWARD_CLOCK": "data",
            "TALLYWARD_SCORING": "worker", "TALLYWARD_WORKER_LEASE_S": str(LEASE_S),
            "TALLYWARD_LOG_LEVEL": "INFO",
            # Scoring alone: a nightly refit would replace the baselines the reference uses.
            "TALLYWARD_REFITS": "off"}


def day_rows(net, *, dead_from: int, dead_s: int = 7200) -> list[dict]:  # type: ignore[no-untyped-def]
    """The test day's counts as the API takes them; DEAD counts 0 from ``dead_from``."""
    ids = [d.detector_id for d in net.detectors]
    rows = []
    for d, t, c in zip(net.detector_index, net.start_s, net.count, strict=True):
        if t < net.test_start_s:
            continue
        dead = ids[int(d)] == DEAD and dead_from <= t < dead_from + dead_s
        rows.append({"detector_id": ids[int(d)], "count": 0 if dead else int(c),
                     "start": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(int(t)))})
    return rows


def post_all(client: httpx.Client, rows: list[dict], key: str) -> None:
    for lo in range(0, len(rows), 500):
        r = client.post("/v1/counts", json={"counts": rows[lo:lo + 500]}, headers=auth(key))
        assert r.status_code == 200, r.text


def alert_set(engine) -> set[tuple]:  # type: ignore[no-untyped-def]
    a = tables.alerts
    with read_transaction(engine) as conn:
        return {tuple(r) for r in conn.execute(select(
            a.c.subject, a.c.kind, a.c.cause, a.c.status, a.c.start_s, a.c.end_s,
            a.c.n_intervals, a.c.withdrawn))}


def test_worker_scores_what_the_api_stores_and_the_alert_is_pollable_within_5_s(
        database_url, engine, keys, tmp_path: Path) -> None:
    """With TALLYWARD_SCORING=worker the API scores nothing itself; a `tallyward worker`
    process beside it scores posted counts, and the dead detector's alert can be polled
    within 5 s of the post."""
    net = small_network(DETS, history_days=21, test_days=1, seed=3)
    load_network(engine, net, until_s=net.test_start_s)
    fitting.fit_many(Settings(database_url=database_url), engine, as_of_s=net.test_start_s)
    rows = day_rows(net, dead_from=net.test_start_s + 7 * 3600)
    env = env_for(database_url)
    log = tmp_path / "serve.log"
    server = serving(database_url, env={k: v for k, v in env.items()
                                        if k.startswith("TALLYWARD_")},
                     log_path=log, start_timeout_s=SERVER_START_S)
    base, _proc = server.__enter__()
    worker = None
    try:
        with httpx.Client(base_url=base, timeout=30) as c:
            morning = [r for r in rows if r["start"] < time.strftime(
                "%Y-%m-%dT%H:%M:%SZ", time.gmtime(net.test_start_s + 6 * 3600))]
            post_all(c, morning, keys["ingest"])
            time.sleep(1.5)  # the API's own lifetime: were it scoring, the backlog would drain
            assert c.get("/v1/health").json()["scoring_backlog"] == len(DETS)
            assert "tallyward serve starting" in log.read_text()
            assert '"scoring":"worker"' in log.read_text()

            worker = WorkerProcess(env)
            worker.wait_started()
            post_all(c, rows[len(morning):], keys["ingest"])
            posted = time.monotonic()
            found = []
            while not found and time.monotonic() - posted < ALERT_WAIT_S:
                found = c.get("/v1/alerts", params={"detector_id": DEAD, "kind": "zero_counts"},
                              headers=auth(keys["read"])).json()["data"]
                if not found:
                    time.sleep(0.1)
            assert len(found) == 1, (found, worker.stderr()[-2000:])
            assert found[0]["cause"] == "detector"
    finally:
        if worker is not None:
            worker.stop()
        server.__exit__(None, None, None)


def test_a_killed_workers_claims_are_taken_over_without_losing_or_doubling_alerts(
        database_url, engine, keys, tmp_path: Path) -> None:
    """SIGKILL a worker in the middle of a scoring pass (it holds claims, nothing written);
    a second worker takes the claims over once their lease expires and finishes: the stored
    alerts are exactly those of one uninterrupted scorer on the same counts."""
    net = small_network(DETS, history_days=21, test_days=1, seed=3)
    load_network(engine, net, until_s=net.test_start_s)
    # No thresholds at fit time: the first pass derives them (seconds of CPU per detector),
    # which gives a pass long enough to be caught in the middle.
    fitting.fit_many(Settings(database_url=database_url), engine, as_of_s=net.test_start_s,
                     thresholds=False)
    rows = day_rows(net, dead_from=net.test_start_s + 7 * 3600)
    env = env_for(database_url)
    server = serving(database_url, env={k: v for k, v in env.items()
                                        if k.startswith("TALLYWARD_")},
                     start_timeout_s=SERVER_START_S)
    base, _proc = server.__enter__()
    first = second = None
    s = tables.detector_state
    try:
        with httpx.Client(base_url=base, timeout=30) as c:
            post_all(c, rows, keys["ingest"])
            first = WorkerProcess(env)
            deadline = time.monotonic() + 60
            while True:
                with read_transaction(engine) as conn:
                    held = conn.execute(select(s.c.detector_id).where(
                        s.c.lease_until_s > time.time())).all()
                if held:
                    break
                assert first.proc.poll() is None and time.monotonic() < deadline, first.stderr()
                time.sleep(0.02)
            first.proc.send_signal(signal.SIGKILL)
            first.proc.wait(10)
            with read_transaction(engine) as conn:
                still_claimed = conn.execute(select(s.c.detector_id).where(
                    s.c.claimed_from_s.is_not(None))).all()
            assert still_claimed, "killed mid-pass: its claims are outstanding"
            assert alert_set(engine) == set() or len(still_claimed) < len(DETS)

            second = WorkerProcess(env)
            deadline = time.monotonic() + TAKEOVER_WAIT_S
            while c.get("/v1/health").json()["scoring_backlog"]:
                assert time.monotonic() < deadline, second.stderr()[-2000:]
                time.sleep(0.2)
            with read_transaction(engine) as conn:
                assert not conn.execute(select(s.c.detector_id).where(
                    s.c.claimed_from_s.is_not(None))).all()
        got = alert_set(engine)
    finally:
        for w in (first, second):
            if w is not None:
                w.stop()
        server.__exit__(None, None, None)

    # The reference: the same history, fit and counts, scored by one scorer without a break.
    url = f"sqlite:///{tmp_path / 'reference.db'}"
    migrate.upgrade(url)
    settings = Settings(database_url=url, clock="data")
    ref = make_engine(settings)
    try:
        load_network(ref, net, until_s=net.test_start_s)
        fitting.fit_many(settings, ref, as_of_s=net.test_start_s, thresholds=False)
        items = [(i, r["detector_id"], r["start"], r["count"]) for i, r in enumerate(rows)]
        ingest.ingest_items(ref, items, future_tolerance_s=10**9, after_store=mark_dirty)
        score_until_idle(ref, settings)
        want = alert_set(ref)
    finally:
        ref.dispose()
    assert any(a[0] == DEAD and a[1] == "zero_counts" for a in want)
    assert got == want


# Two workers splitting one network's scoring: a few dozen detectors, some with faults.
SHARED = tuple(sorted(
    [f"bra3-{d}-{lane}" for d, lanes in (("eb", ("lt", "rt", "t1")), ("nb", ("lt", "t1", "t2")),
                                         ("sb", ("lt", "t1", "t2")), ("wb", ("lt", "rt", "t1")))
     for lane in lanes]
    + [f"kfw-{d}-{mp}-l{lane}" for d in ("nb", "sb") for mp in ("031", "054")
       for lane in (1, 2, 3)]))
ZEROS = ("kfw-nb-031-l1", "kfw-nb-054-l2", "kfw-sb-031-l3")  # count 0 from 06:00 on
SILENT = "bra3-eb-t1"  # no reports 07:00-08:00
FEED_HOURS = 9  # local midnight to 09:00 of the test day
BATCH = 4  # TALLYWARD_SCORING_BATCH: detectors per pass, so that passes are many and short


def hourly_feed(net) -> list[list[dict]]:  # type: ignore[no-untyped-def]
    """The first FEED_HOURS of the test day as the API takes them, one list per hour in time
    order (so no interval arrives after a later one was scored: nothing needs rescoring)."""
    ids = [d.detector_id for d in net.detectors]
    t0 = net.test_start_s
    hours: list[list[tuple[int, str, int]]] = [[] for _ in range(FEED_HOURS)]
    for d, t, c in zip(net.detector_index, net.start_s, net.count, strict=True):
        t, det = int(t), ids[int(d)]
        if not t0 <= t < t0 + FEED_HOURS * 3600:
            continue
        if det == SILENT and t0 + 7 * 3600 <= t < t0 + 8 * 3600:
            continue
        zero = det in ZEROS and t >= t0 + 6 * 3600
        hours[(t - t0) // 3600].append((t, det, 0 if zero else int(c)))
    return [[{"detector_id": det, "count": c,
              "start": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t))}
             for t, det, c in sorted(hour)] for hour in hours]


def scored_spans(log_text: str) -> list[tuple[str, int, int]]:
    """(detector, from, to) of every span a worker's DEBUG log says it scored and committed."""
    out = []
    for line in log_text.splitlines():
        if '"scored batch"' not in line:
            continue
        for det, (lo, hi) in json.loads(line)["spans"].items():
            out.append((det, int(lo), int(hi)))
    return out


def test_two_workers_share_scoring_and_score_every_interval_exactly_once(
        database_url, engine, keys) -> None:
    """Two `tallyward worker` processes beside the API score a network of 24 detectors fed
    hour by hour: each scores a share, every posted interval of every detector is scored by
    exactly one of them (their logged spans tile the fed hours without overlap and end where
    detector_state says scoring stands), and each injected fault has exactly one alert."""
    net = small_network(SHARED, history_days=14, test_days=1, seed=11)
    assert len(net.detectors) == len(SHARED) == 24
    load_network(engine, net, until_s=net.test_start_s)
    feed = hourly_feed(net)
    t0, t_end = net.test_start_s, net.test_start_s + FEED_HOURS * 3600
    env = {**env_for(database_url), "TALLYWARD_SCORING_BATCH": str(BATCH),
           "TALLYWARD_WORKER_POLL_S": "0.2", "TALLYWARD_LOG_LEVEL": "DEBUG"}
    # The workers start while the baselines are fitted (nothing is due before the test day).
    workers = [WorkerProcess(env), WorkerProcess(env)]
    server = None
    try:
        fitting.fit_many(Settings(database_url=database_url), engine,
                         as_of_s=net.test_start_s, workers=2)
        server = serving(database_url, env={k: v for k, v in env.items()
                                            if k.startswith("TALLYWARD_")},
                         start_timeout_s=SERVER_START_S)
        base, _proc = server.__enter__()
        for w in workers:
            w.wait_started()
        with httpx.Client(base_url=base, timeout=30) as c:
            for hour in feed:
                # Each hour once the last is scored: counts that arrive while a detector's
                # pass is under way mark it for rescoring from their day block (redundant,
                # with the same results), which would blur "scored once" below.
                post_all(c, hour, keys["ingest"])
                deadline = time.monotonic() + TAKEOVER_WAIT_S
                while c.get("/v1/health").json()["scoring_backlog"]:
                    assert time.monotonic() < deadline, workers[0].stderr()[-2000:]
                    time.sleep(0.1)
        logs = [w.stderr() for w in workers]
    finally:
        for w in workers:
            w.stop()
        if server is not None:
            server.__exit__(None, None, None)

    # Both workers did a share, and neither logged a failure.
    per_worker = [scored_spans(text) for text in logs]
    assert all(per_worker), [len(s) for s in per_worker]
    assert not any('"level":"warning"' in t or '"level":"error"' in t for t in logs), logs

    # Where scoring must stand: through each detector's last posted interval, and through
    # every interval whose grace period has passed on the data clock (the latest interval
    # posted) even without data (the simulated feed drops single intervals now and then).
    step, grace = 300, Settings().missing_grace_s
    last = {r["detector_id"]: int(calendar.timegm(time.strptime(r["start"],
                                                                "%Y-%m-%dT%H:%M:%SZ")))
            for hour in feed for r in hour}
    clock = max(last.values())
    due_end = (clock - grace - step) // step * step + step
    want_end = {det: max(due_end, last[det] + step) for det in SHARED}
    assert min(want_end.values()) >= t_end - grace

    # Every interval of every detector scored exactly once: the spans of both workers, in
    # order, run from the first fed interval to that end without a gap or an overlap ...
    spans: dict[str, list[tuple[int, int]]] = {det: [] for det in SHARED}
    for det, lo, hi in (s for part in per_worker for s in part):
        spans[det].append((lo, hi))
    for det, got in spans.items():
        got.sort()
        assert got and got[0][0] == t0 and got[-1][1] == want_end[det], (det, got)
        assert all(a[1] == b[0] for a, b in zip(got, got[1:], strict=False)), (det, got)
    # ... which is where each detector's scoring state stands, with nothing claimed or failed.
    s = tables.detector_state
    with read_transaction(engine) as conn:
        state = {r.detector_id: r for r in conn.execute(select(s))}
    assert {det: (r.scored_through_s, r.claimed_from_s, r.dirty_from_s, r.failures)
            for det, r in state.items()} == {det: (want_end[det], None, None, 0)
                                             for det in SHARED}

    # The faults' alerts, each exactly once; nothing withdrawn (nothing was rescored).
    a = tables.alerts
    with read_transaction(engine) as conn:
        alerts = conn.execute(select(a.c.subject, a.c.kind, a.c.start_s, a.c.withdrawn)
                              .where(a.c.part_of.is_(None))).all()
    keys_seen = [(r.subject, r.kind, r.start_s) for r in alerts]
    assert len(keys_seen) == len(set(keys_seen))
    assert not [r for r in alerts if r.withdrawn]
    for det in ZEROS:
        zero = [r for r in alerts if r.subject == det and r.kind == "zero_counts"]
        assert len(zero) == 1, (det, alerts)
        assert t0 + 6 * 3600 <= zero[0].start_s < t0 + 7 * 3600
    silent = [r for r in alerts if r.kind == "no_reports" and SILENT in r.subject]
    assert len(silent) == 1, alerts
    assert t0 + 7 * 3600 <= silent[0].start_s < t0 + 8 * 3600
