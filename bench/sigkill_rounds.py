"""Durability under SIGKILL, round after round: an acknowledged batch is never lost or half-stored.

    .venv/bin/python bench/sigkill_rounds.py [--rounds 50] [--database-url URL] [--seed 1]

Each round starts ``tallyward serve`` (a real process: uvicorn, one worker), streams count
batches at it from ``--clients`` clients, sends ``kill -9`` to the server at a random moment,
restarts it, and checks in the database that

- every batch answered 200, 409 or 422 is fully present (all its valid items are stored),
- no batch is half-present (its valid items are all stored or none is), answered or not.

Batches mix the three acknowledged outcomes: most are clean (200), every fifth holds one
item with a negative count (422: the other items must be stored), every seventh repeats one
interval with another value (409: the first value is stored). Each round writes new
intervals of detectors registered for this run only, so the script can run on a database
that already holds data. Without ``--database-url`` it uses a fresh SQLite file.
Prints one line per round and a summary; exits 1 if any acknowledged item was lost or any
batch was half-present.
"""

from __future__ import annotations

import argparse
import os
import random
import secrets
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path

import httpx
import orjson
from sqlalchemy import select

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from service.config import Settings  # noqa: E402
from service.store import keys as security  # noqa: E402
from service.store import migrations as migrate  # noqa: E402
from service.store import tables as models  # noqa: E402
from service.store.engine import make_engine  # noqa: E402
from service.tools.networks import make_detector  # noqa: E402

DETECTORS = 4
INTERVALS = 25  # per detector per batch: 100 items a batch
INTERVAL_S = 300
FIRST_START = datetime(2010, 1, 4, 6, 0, tzinfo=UTC)  # a Monday 00:00 in America/Chicago
SERVER_START_TIMEOUT_S = 60.0
ACKNOWLEDGED = (200, 409, 422)


@dataclass
class Batch:
    body: bytes
    valid_keys: set[tuple[str, int]]  # what must be stored once the batch is acknowledged
    expected_status: int
    status: int | None = None  # None: no answer (in flight at the kill, or never sent)


@dataclass
class Totals:
    sent: int = 0
    by_status: dict[str, int] = field(default_factory=dict)
    acknowledged_items: int = 0
    lost_items: int = 0
    half_present: int = 0
    unexpected_status: int = 0
    in_flight_stored: int = 0


def free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Server:
    """``tallyward serve`` as a child process; its log goes to a file, never to a full pipe."""

    def __init__(self, database_url: str, log_path: Path) -> None:
        self.database_url = database_url
        self.log_path = log_path
        self.proc: subprocess.Popen[bytes] | None = None
        self.url = ""

    def start(self) -> None:
        port = free_port()
        self.url = f"http://127.0.0.1:{port}"
        env = {**{k: v for k, v in os.environ.items() if not k.startswith("TALLYWARD_")},
               "TALLYWARD_DATABASE_URL": self.database_url, "TALLYWARD_LOG_LEVEL": "WARNING"}
        with open(self.log_path, "ab") as log:
            self.proc = subprocess.Popen(
                [sys.executable, "-m", "service.cli", "serve", "--port", str(port)],
                cwd=REPO, env=env, stdout=subprocess.DEVNULL, stderr=log)
        deadline = time.monotonic() + SERVER_START_TIMEOUT_S
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError("server exited at start; see " + str(self.log_path))
            try:
                if httpx.get(self.url + "/v1/health", timeout=1).status_code == 200:
                    return
            except httpx.HTTPError:
                pass
            time.sleep(0.05)
        raise RuntimeError(f"server did not answer /v1/health in {SERVER_START_TIMEOUT_S:.0f} s")

    def kill(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.kill()  # SIGKILL: no shutdown handler runs
            self.proc.wait(30)

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(30)
            except subprocess.TimeoutExpired:
                self.kill()


def make_batches(detectors: list[str], numbers: range) -> list[Batch]:
    """Batch number ``b`` holds every detector's intervals ``25 b .. 25 b + 24`` after
    ``FIRST_START``: distinct numbers never share an interval."""
    batches = []
    for b in numbers:
        first = FIRST_START + timedelta(seconds=INTERVAL_S * INTERVALS * b)
        items = [{"detector_id": det, "count": (d * 13 + k * 7 + b) % 90,
                  "start": (first + timedelta(seconds=INTERVAL_S * k)).strftime("%Y-%m-%dT%H:%M:%SZ")}
                 for k in range(INTERVALS) for d, det in enumerate(detectors)]
        keys = {(it["detector_id"], int(datetime.fromisoformat(it["start"]).timestamp()))
                for it in items}
        expected = 200
        if b % 5 == 4:  # one item no database may hold: the batch is a 422, the rest stored
            items[len(items) // 2] = dict(items[len(items) // 2], count=-1)
            bad = items[len(items) // 2]
            keys.discard((bad["detector_id"], int(datetime.fromisoformat(bad["start"]).timestamp())))
            expected = 422
        elif b % 7 == 6:  # the same interval twice with different values: 409, first kept
            items.append(dict(items[0], count=items[0]["count"] + 1))
            expected = 409
        batches.append(Batch(orjson.dumps({"counts": items}), keys, expected))
    return batches


def stream(url: str, key: str, batches: list[Batch], stop: threading.Event,
           first_answer: threading.Event) -> None:
    headers = {"Authorization": f"Bearer {key}", "Content-Type": "application/json"}
    with httpx.Client(base_url=url, timeout=60) as c:
        for batch in batches:
            if stop.is_set():
                return
            try:
                r = c.post("/v1/counts", content=batch.body, headers=headers)
            except httpx.HTTPError:
                return  # the server is gone: this batch has no answer
            batch.status = r.status_code
            first_answer.set()


def stored_keys(engine, detectors: list[str], batches: list[Batch]) -> set[tuple[str, int]]:  # type: ignore[no-untyped-def]
    """The stored (detector, start) keys within the time span of ``batches``."""
    starts = [start for batch in batches for _, start in batch.valid_keys]
    c = models.counts
    with engine.connect() as conn:
        rows = conn.execute(select(c.c.detector_id, c.c.start_s).where(
            c.c.detector_id.in_(detectors), c.c.start_s >= min(starts),
            c.c.start_s <= max(starts))).all()
    return {(r.detector_id, r.start_s) for r in rows}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=50)
    parser.add_argument("--database-url", default=None,
                        help="SQLAlchemy URL (default: a fresh SQLite file in a temporary folder)")
    parser.add_argument("--clients", type=int, default=1, help="concurrent streaming clients")
    parser.add_argument("--batches-per-round", type=int, default=1000,
                        help="batches each client may send in a round (a bound, not a target)")
    parser.add_argument("--max-kill-delay", type=float, default=1.5,
                        help="the kill comes 0..this many seconds after the first answer")
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args(argv)
    rng = random.Random(args.seed)

    with tempfile.TemporaryDirectory(prefix="tallyward-sigkill-") as tmp:
        url = args.database_url or f"sqlite:///{Path(tmp) / 'sigkill.db'}"
        url = Settings(database_url=url).database_url
        migrate.upgrade(url)
        engine = make_engine(Settings(database_url=url))
        run = secrets.token_hex(3)
        detectors = [f"sk-{run}-{i}" for i in range(DETECTORS)]
        for det in detectors:
            make_detector(engine, det)
        key = security.create_key(engine, name=f"sigkill-{run}", role="ingest")
        server = Server(url, Path(tmp) / "server.log")
        backend = url.split(":", 1)[0].split("+", 1)[0]
        print(f"SIGKILL rounds on {backend}: {args.rounds} rounds, {args.clients} client(s), "
              f"{DETECTORS * INTERVALS}-item batches, seed {args.seed}, run {run}")
        totals = Totals()
        next_number = 0
        started = time.perf_counter()
        try:
            server.start()
            for round_no in range(args.rounds):
                # Client n sends numbers next + n, next + n + clients, ...: a round uses only
                # as much of the time axis as it sends, so many rounds stay in the past.
                per_client = [make_batches(detectors, range(next_number + n, next_number
                                                            + args.clients * args.batches_per_round,
                                                            args.clients))
                              for n in range(args.clients)]
                stop, first_answer = threading.Event(), threading.Event()
                threads = [threading.Thread(target=stream, args=(server.url, key, batches, stop,
                                                                 first_answer))
                           for batches in per_client]
                for t in threads:
                    t.start()
                first_answer.wait(60)
                delay = rng.uniform(0, args.max_kill_delay)
                time.sleep(delay)
                server.kill()
                stop.set()
                for t in threads:
                    t.join(120)
                if any(t.is_alive() for t in threads):
                    raise RuntimeError("a client did not stop within 120 s of the kill")
                server.start()  # the restart: recovery must not need anything but a start
                sent = [b for batches in per_client for b in batches]
                present = stored_keys(engine, detectors, sent)
                used = max((i for batches in per_client for i, b in enumerate(batches)
                            if b.status is not None or b.valid_keys & present), default=0)
                next_number += args.clients * (used + 2)
                round_lost = round_half = round_ack = 0
                for batch in sent:
                    if batch.status is None and not (batch.valid_keys & present):
                        continue  # never stored (not sent, or in flight and rolled back)
                    if batch.status is not None:
                        totals.sent += 1
                        label = str(batch.status)
                        totals.by_status[label] = totals.by_status.get(label, 0) + 1
                    inside = len(batch.valid_keys & present)
                    if 0 < inside < len(batch.valid_keys):
                        round_half += 1
                    if batch.status in ACKNOWLEDGED:
                        round_ack += 1
                        totals.acknowledged_items += len(batch.valid_keys)
                        round_lost += len(batch.valid_keys) - inside
                        if batch.status != batch.expected_status:
                            totals.unexpected_status += 1
                    elif batch.status is None and inside:
                        totals.in_flight_stored += 1
                totals.lost_items += round_lost
                totals.half_present += round_half
                print(f"round {round_no + 1:3d}: kill after {delay:4.2f} s, {round_ack:4d} batches "
                      f"acknowledged, {round_lost} items lost, {round_half} half-present", flush=True)
        finally:
            server.stop()
            engine.dispose()
        elapsed = time.perf_counter() - started
        statuses = ", ".join(f"{k}: {v:,}" for k, v in sorted(totals.by_status.items()))
        print(f"\n{args.rounds} rounds in {elapsed:.0f} s on {backend}")
        print(f"  batches answered        {totals.sent:,} ({statuses})")
        print(f"  acknowledged items      {totals.acknowledged_items:,} (200/409/422: all valid "
              "items must be stored)")
        print(f"  items lost              {totals.lost_items:,}")
        print(f"  half-present batches    {totals.half_present:,}")
        print(f"  unanswered but stored   {totals.in_flight_stored:,} (committed just before the "
              "kill: allowed)")
        print(f"  unexpected status       {totals.unexpected_status:,}")
        ok = totals.lost_items == 0 and totals.half_present == 0
        print("PASS" if ok else "FAIL")
        return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
