"""Memory of a server answering many large count reads at once.

    .venv/bin/python bench/counts_memory.py [--rows 500000] [--parallel 40] [--limit 100000]

Builds a SQLite database of ``--rows`` counts (five detectors), starts ``tallyward serve``
on a loopback port, and sends ``--parallel`` simultaneous ``GET /v1/counts?limit=...``
requests (each then follows ``next_from`` until its detector is read through, when the
service offers it). Prints the server's resident memory before, at its peak and after.
"""

from __future__ import annotations

import argparse
import sqlite3
import sys
import tempfile
import threading
import time
from pathlib import Path

import httpx

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from service.config import Settings  # noqa: E402
from service.store import keys as security  # noqa: E402
from service.store import migrations as migrate  # noqa: E402
from service.store.engine import make_engine  # noqa: E402
from service.tools.networks import make_detector, serving  # noqa: E402

DETECTORS = 5
FIRST_START_S = 1_700_000_100  # a multiple of 300 s


def rss_mib(pid: int) -> tuple[float, float]:
    """(current, peak) resident set size of a process in MiB."""
    fields = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        name, _, value = line.partition(":")
        fields[name] = value.strip()
    return int(fields["VmRSS"].split()[0]) / 1024, int(fields["VmHWM"].split()[0]) / 1024


def build(path: Path, rows: int) -> str:
    url = f"sqlite:///{path}"
    migrate.upgrade(url)
    engine = make_engine(Settings(database_url=url))
    for d in range(DETECTORS):
        make_detector(engine, f"M{d}")
    key = security.create_key(engine, name="reader", role="read")
    engine.dispose()
    per = rows // DETECTORS
    with sqlite3.connect(path) as conn:
        conn.executemany(
            "INSERT INTO counts (detector_id, start_s, count, received_s) VALUES (?, ?, ?, 0)",
            ((f"M{d}", FIRST_START_S + 300 * i, (i * 7 + d) % 97)
             for d in range(DETECTORS) for i in range(per)))
    return key


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=int, default=500_000)
    p.add_argument("--parallel", type=int, default=40)
    p.add_argument("--limit", type=int, default=100_000)
    args = p.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        db = Path(tmp) / "memory.db"
        key = build(db, args.rows)
        with serving(f"sqlite:///{db}", env={"TALLYWARD_SCORING": "off"}) as (base, proc):
            headers = {"Authorization": f"Bearer {key}"}
            httpx.get(base + "/v1/counts", params={"detector_id": "M0", "limit": 10},
                      headers=headers, timeout=30)
            before, _ = rss_mib(proc.pid)
            results: list[tuple[int, int, int]] = []

            def read(i: int) -> None:
                params = {"detector_id": f"M{i % DETECTORS}", "limit": args.limit}
                rows = pages = 0
                with httpx.Client(base_url=base, headers=headers, timeout=300) as c:
                    while True:
                        r = c.get("/v1/counts", params=params)
                        if r.status_code != 200:
                            results.append((r.status_code, rows, pages))
                            return
                        doc = r.json()
                        rows += len(doc["data"])
                        pages += 1
                        if not doc.get("next_from") or rows >= args.limit:
                            break
                        params["from"] = doc["next_from"]
                results.append((200, rows, pages))

            started = time.perf_counter()
            threads = [threading.Thread(target=read, args=(i,)) for i in range(args.parallel)]
            for t in threads:
                t.start()
            for t in threads:
                t.join()
            seconds = time.perf_counter() - started
            time.sleep(1)
            after, peak = rss_mib(proc.pid)
    statuses = sorted({s for s, _, _ in results})
    print(f"{args.parallel} parallel reads of up to {args.limit:,} rows from {args.rows:,} counts: "
          f"statuses {statuses}, rows per reader {min(r for _, r, _ in results):,}.."
          f"{max(r for _, r, _ in results):,}, pages per reader "
          f"{min(p for _, _, p in results)}..{max(p for _, _, p in results)}, {seconds:.1f} s")
    print(f"server RSS MiB: before {before:.0f}, peak {peak:.0f}, after {after:.0f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
