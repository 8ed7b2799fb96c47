"""Overlapping count batches sent at once in opposite orders: no deadlock, no 503, one copy."""

from __future__ import annotations

import threading
import time
from datetime import timedelta

import httpx
from sqlalchemy import create_engine, func, select, text

from service.store import tables as models
from tests.conftest import LiveServer, auth
from tests.factories import MONDAY_LOCAL_MIDNIGHT, make_detector, rfc3339

DETECTORS = [f"C{i}" for i in range(8)]
THREADS = 6
ROUNDS = 6
WINDOW = 120  # intervals per detector in one batch; consecutive rounds overlap by 80
STEP = 40


def batch(round_no: int, *, descending: bool) -> list[dict]:
    first = MONDAY_LOCAL_MIDNIGHT - timedelta(days=20)
    items = [{"detector_id": det, "count": (k * 7 + d) % 50,
              "start": rfc3339(first + timedelta(seconds=300 * k))}
             for d, det in enumerate(DETECTORS)
             for k in range(round_no * STEP, round_no * STEP + WINDOW)]
    return items[::-1] if descending else items


def deadlocks(url: str) -> int | None:
    """pg_stat_database.deadlocks of the test database once no other session is connected
    (a session's statistics are flushed when it ends); None on SQLite."""
    if not url.startswith("postgresql"):
        return None
    engine = create_engine(url)
    try:
        with engine.connect() as conn:
            deadline = time.monotonic() + 30  # a bound on waiting for the server's sessions to end
            while time.monotonic() < deadline and conn.execute(text(
                    "SELECT count(*) FROM pg_stat_activity WHERE datname = current_database() "
                    "AND pid <> pg_backend_pid()")).scalar_one():
                time.sleep(0.1)
            conn.execute(text("SELECT pg_stat_clear_snapshot()"))
            return conn.execute(text("SELECT deadlocks FROM pg_stat_database "
                                     "WHERE datname = current_database()")).scalar_one()
    finally:
        engine.dispose()


def test_overlapping_batches_in_opposite_orders_never_deadlock(database_url, engine, keys) -> None:
    """Six clients post overlapping batches, half in reverse order, through a real server:
    every answer is 200, each interval is stored once, and PostgreSQL counts no deadlock."""
    for det in DETECTORS:
        make_detector(engine, det)
    engine.dispose()
    before = deadlocks(database_url)
    server = LiveServer(database_url, env={"TALLYWARD_SCORING": "off"}).start()
    statuses: list[int] = []
    accepted: list[int] = []
    barrier = threading.Barrier(THREADS, timeout=120)

    def client(n: int) -> None:
        with httpx.Client(base_url=server.url, timeout=120) as c:
            for round_no in range(ROUNDS):
                barrier.wait()
                r = c.post("/v1/counts", json={"counts": batch(round_no, descending=n % 2 == 1)},
                           headers=auth(keys["ingest"]))
                statuses.append(r.status_code)
                if r.status_code == 200:
                    accepted.append(r.json()["accepted"])

    threads = [threading.Thread(target=client, args=(n,)) for n in range(THREADS)]
    try:
        for t in threads:
            t.start()
        for t in threads:
            t.join(300)
    finally:
        server.stop()
    assert not any(t.is_alive() for t in threads)
    assert statuses == [200] * (THREADS * ROUNDS), sorted(set(statuses))
    expected_rows = len(DETECTORS) * ((ROUNDS - 1) * STEP + WINDOW)
    assert sum(accepted) == expected_rows
    with engine.connect() as conn:
        assert conn.execute(select(func.count()).select_from(models.counts)).scalar_one() \
            == expected_rows
    engine.dispose()
    assert deadlocks(database_url) == before
