"""Scoring-pass cost: detector passes per second of one scorer, and where the time goes.

    .venv/bin/python bench/score_pass.py                    # PostgreSQL and SQLite, 1,000 + 50
    .venv/bin/python bench/score_pass.py --detectors 2000 --skip-sqlite --profile

Builds the load benchmark's network (``bench/load.py``: 5-minute detectors in groups of four,
plus 5 % at 20 s), loads ``--weeks`` of history in bulk, fits every baseline with thresholds,
then ``--slots`` times: stores the next 5 minutes of every detector through the product's
ingest (with the scoring hook that marks detectors dirty) and scores them with one scorer
(``score_until_idle``, batches of ``--batch``), timing each phase of the pass:

- claim: the lease (one read, one write transaction);
- read: the detectors' registry rows, latest intervals and counts (one read transaction);
- compute: the statistics (``evaluate_piece``) per detector;
- write: evidence, scoring state, alerts (one write transaction).

It prints detector passes per second and milliseconds per detector per phase (medians over
the slots), and against the rate the load benchmark's network needs at 10x real time
(10,500 detectors, a 5-minute slot every 30 s: 350 passes/s across all scorers).
The first slot (thresholds read, caches filled) is reported apart.

A script, not a test; run it on a quiet machine.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import pstats
import statistics
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "bench"))

from load import DAY_S, SLOT_S, START_S, Network, fit_network, load_history  # noqa: E402

from service.config import Settings  # noqa: E402
from service.pipeline import ingest  # noqa: E402
from service.pipeline import score as scoring  # noqa: E402
from service.pipeline.retention import maintain_storage  # noqa: E402
from service.store import migrations as migrate  # noqa: E402
from service.store import scoring as store  # noqa: E402
from service.store.engine import make_worker_engine  # noqa: E402
from service.store.scratch import scratch_database  # noqa: E402
from service.timefmt import format_utc  # noqa: E402

NEEDED_PER_S = 10_500 / (SLOT_S / 10)  # the load benchmark's network at 10x real time


class PhaseTimer:
    """Wraps the pass's phase functions to add up their wall time."""

    def __init__(self) -> None:
        self.t = {"claim": 0.0, "read": 0.0, "compute": 0.0, "write": 0.0}

    def wrap(self, module, name: str, phase: str) -> None:  # type: ignore[no-untyped-def]
        orig = getattr(module, name)

        def timed(*a, **k):  # type: ignore[no-untyped-def]
            t0 = time.perf_counter()
            try:
                return orig(*a, **k)
            finally:
                self.t[phase] += time.perf_counter() - t0

        setattr(module, name, timed)

    def reset(self) -> None:
        for k in self.t:
            self.t[k] = 0.0


def run(url: str, args: argparse.Namespace, label: str) -> dict:
    print(f"== {label}", file=sys.stderr)
    migrate.upgrade(url)
    settings = Settings(database_url=url, clock="data", scoring="off",
                        partition_ahead_days=args.weeks * 7 + 14)
    engine = make_worker_engine(settings)
    maintain_storage(engine, settings, START_S)
    network = Network(args.detectors, args.detectors // 20)
    network.register(engine)
    load_history(engine, network, weeks=args.weeks, ingest_hours=0)
    as_of = START_S + args.weeks * 7 * DAY_S
    ids = network.long_ids + network.short_ids
    fit_network(settings, engine, ids, as_of_s=as_of, fractions=[1.0])
    timer = PhaseTimer()
    timer.wrap(store, "claim", "claim")
    timer.wrap(scoring, "write_scored", "write")
    timer.wrap(scoring, "evaluate_piece", "compute")
    cache = scoring.ScoringCache()
    per_slot = []
    prof = cProfile.Profile() if args.profile else None
    for k in range(args.slots + 1):
        lo = as_of + k * SLOT_S
        # Short detectors post 15 intervals per slot; long ones one.
        items = [(i, d, format_utc(t), c)
                 for i, (d, t, c) in enumerate(network.items(lo, lo + SLOT_S))]
        ingest.ingest_items(engine, items, future_tolerance_s=10**12,
                            after_store=store.mark_dirty)
        timer.reset()
        if prof is not None and k > 0:
            prof.enable()
        t0 = time.perf_counter()
        n = scoring.score_until_idle(engine, settings, limit=args.batch, cache=cache)
        wall = time.perf_counter() - t0
        if prof is not None and k > 0:
            prof.disable()
        phases = dict(timer.t)
        # read = the read transaction of score_claims, less the statistics inside it
        phases["read"] = wall - phases["claim"] - phases["write"] - phases["compute"]
        per_slot.append({"n": n, "wall": wall, **phases})
        print(f"  slot {k}: {n} detector passes in {wall:.2f} s "
              f"({n / wall:,.0f}/s)", file=sys.stderr)
    engine.dispose()
    if prof is not None:
        out = io.StringIO()
        pstats.Stats(prof, stream=out).sort_stats("cumulative").print_stats(45)
        print(out.getvalue(), file=sys.stderr)
    return {"label": label, "detectors": len(ids), "first": per_slot[0],
            "slots": per_slot[1:]}


def report(r: dict) -> None:
    slots = r["slots"]
    rate = statistics.median(s["n"] / s["wall"] for s in slots)
    print(f"\n{r['label']}: {r['detectors']:,} detectors, one scorer, "
          f"{len(slots)} slots (median)")
    first = r["first"]
    print(f"  first slot (caches cold): {first['n'] / first['wall']:,.0f} passes/s")
    print(f"  passes/s: {rate:,.0f}  (x{rate / NEEDED_PER_S:.2f} of the {NEEDED_PER_S:.0f}/s "
          "the 10,500-detector network needs at 10x)")
    for phase in ("claim", "read", "compute", "write"):
        ms = statistics.median(1000 * s[phase] / s["n"] for s in slots)
        print(f"  {phase:8s} {ms:6.2f} ms per detector")


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--detectors", type=int, default=1000, help="5-minute detectors")
    p.add_argument("--weeks", type=int, default=2)
    p.add_argument("--slots", type=int, default=6, help="5-minute slots scored")
    p.add_argument("--batch", type=int, default=64, help="detectors per scoring pass")
    p.add_argument("--pg", default="postgresql+psycopg://postgres@127.0.0.1:5432/postgres")
    p.add_argument("--skip-pg", action="store_true")
    p.add_argument("--skip-sqlite", action="store_true")
    p.add_argument("--profile", action="store_true", help="print a cProfile of the slots")
    args = p.parse_args()
    results = []
    if not args.skip_pg:
        with scratch_database(args.pg, "tallyward_scorebench", migrate=False) as url:
            results.append(run(url, args, "PostgreSQL"))
    if not args.skip_sqlite:
        with tempfile.TemporaryDirectory() as tmp:
            results.append(run(f"sqlite:///{tmp}/score.db", args, "SQLite"))
    for r in results:
        report(r)
    return 0


if __name__ == "__main__":
    sys.exit(main())
