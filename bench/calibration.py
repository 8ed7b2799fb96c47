"""False alerts and band coverage on normal traffic outside the model class, through the real
pipeline (SQLite file, ingest, fit from the history, scoring on the data clock).

    .venv/bin/python bench/calibration.py [--per-class 8] [--scored-weeks 4] [--budget 0.05]
                                          [--history 8,3] [--swings 0.10:0.6,0.15:0.8]

Prints, per volume class and overall, false alerts per detector-week and the ratio to the
budget, for each history length and swing setting, plus the share of scored counts inside the
served 95 % band. The traffic is described in ``service/tools/calibration.py``.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from service.store import migrations as migrate  # noqa: E402
from service.tools import calibration  # noqa: E402


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--per-class", type=int, default=8)
    parser.add_argument("--scored-weeks", type=int, default=4)
    parser.add_argument("--budget", type=float, default=0.05)
    parser.add_argument("--history", default="8,3", help="history lengths, weeks")
    parser.add_argument("--swings", default="0.10:0.6,0.15:0.8",
                        help="sd:lag-one-correlation settings of the hourly swings")
    parser.add_argument("--seed", type=int, default=20260601)
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args(argv)
    for swing in args.swings.split(","):
        sd, phi = (float(v) for v in swing.split(":"))
        for weeks in (int(w) for w in args.history.split(",")):
            with tempfile.TemporaryDirectory() as folder:
                url = f"sqlite:///{Path(folder) / 'calibration.db'}"
                migrate.upgrade(url)
                cal = calibration.run(url, per_class=args.per_class, history_weeks=weeks,
                                      scored_weeks=args.scored_weeks,
                                      traffic=calibration.Traffic(swing_sd=sd, swing_phi=phi),
                                      seed=args.seed, budget=args.budget, workers=args.workers)
            print(calibration.table(cal), flush=True)
            print(flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
