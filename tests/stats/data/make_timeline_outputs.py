"""Record the timeline scorer's outputs on fixed seeded inputs (``timeline_outputs.npz``).

``tests/stats/test_timeline_outputs.py`` checks that ``score_timeline`` still reproduces them
(to 1e-12 relative), so that speed work on the scorer cannot change a result unnoticed. Run
``.venv/bin/python tests/stats/data/make_timeline_outputs.py`` to regenerate the file, only
when a change of the scorer's results is intended.

The cases: busy and quiet detectors, missing intervals, runs of zeros, repeated values,
counts over capacity, level shifts that raise CUSUM alarms, Poisson (no dispersion), and
without local days; each scored in four uneven chunks carrying the warm state (so every chunk
but the first starts from a warm state). The test also scores each case in one call, which
must give the same results as the chunks.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np

from service.domain import KINDS
from service.stats.thresholds import Thresholds
from service.stats.timeline import WarmState, score_timeline

OUT = Path(__file__).with_name("timeline_outputs.npz")
PER_DAY = 288
INTERVAL_S = 300
START_S = 1_700_000_100 - 1_700_000_100 % INTERVAL_S
# fixed thresholds (not calibrated here, so that a calibration change does not move the file)
THRESHOLDS = Thresholds(
    false_alerts_per_week=0.05, interval_s=INTERVAL_S, log_alpha_low=-14.5,
    log_alpha_high=-14.5, log_alpha_zero_run=-13.8, log_alpha_repeat=-13.8, min_repeat=3,
    missing_run=4, log_missing_rate=-4.6, rho_low=0.5, rho_high=2.0, h_low=9.0, h_high=9.5,
    level_memory_s=3600.0, level_memory_max_s=6 * 3600.0, level_information=60.0,
    level_guard_s=1800.0)
CHUNKS = (0, 100, 280, 290, 2 * PER_DAY)  # chunk bounds (uneven, one crossing a day)


def profile(peak: float, n: int) -> np.ndarray:
    h = (np.arange(n) % PER_DAY + 0.5) * INTERVAL_S / 3600.0
    return peak * (0.03 + 0.55 * np.exp(-0.5 * ((h - 8.0) / 1.3) ** 2)
                   + 0.6 * np.exp(-0.5 * ((h - 17.2) / 1.8) ** 2)
                   + 0.35 * np.exp(-0.5 * ((h - 12.5) / 3.5) ** 2))


def case_inputs(name: str) -> dict[str, Any]:
    """Inputs of one case (two days of 5-min intervals, seeded)."""
    n = CHUNKS[-1]
    rng = np.random.default_rng(sum(map(ord, name)))
    peak = {"quiet": 3.0, "poisson_quiet": 1.5}.get(name, 90.0)
    mu = profile(peak, n)
    da = np.full(n, 0.01)
    ia = np.full(n, 0.02)
    se = np.full(n, 0.05) + 0.02 * rng.random(n)
    if name.startswith("poisson"):
        da[:] = 0.0
        ia[:] = 0.0
        se[:] = 0.0
    day_factor = rng.gamma(100, 1 / 100, 2).repeat(PER_DAY)
    y = rng.poisson(mu * day_factor * rng.gamma(50, 1 / 50, n)).astype(float)
    present = rng.random(n) > 0.01
    cap = 400.0
    if name == "missing":
        present[150:170] = False
        present[500:502] = False
        present[rng.random(n) < 0.05] = False
    if name == "zeros":
        y[200:230] = 0  # a dead detector by day
        y[400:404] = 0
    if name == "repeats":
        y[300:312] = 57
        y[450:455] = 12
    if name == "over_capacity":
        y[[220, 221, 500, 570]] = [450, 1200, 401, 999]
    if name == "shifts":
        y[100:180] = rng.poisson(0.45 * mu[100:180])  # a lost lane: low alarms
        y[420:500] = rng.poisson(2.2 * mu[420:500])  # a chattering card: high alarms
    local_day = None if name == "no_days" else (np.arange(n) // PER_DAY + 19000)
    return {"y": y, "present": present, "mu": mu, "log_se": se, "day_alpha": da,
            "interval_alpha": ia, "cap": cap, "local_day": local_day}


CASES = ("busy", "quiet", "poisson_quiet", "missing", "zeros", "repeats", "over_capacity",
         "shifts", "no_days")


def score_chunks(inp: dict[str, Any], warm: WarmState | None = None,
                 bounds: tuple[int, ...] = CHUNKS) -> list[Any]:
    """Evidence of each chunk, scored in order carrying the warm state."""
    out = []
    for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
        day = None if inp["local_day"] is None else inp["local_day"][lo:hi]
        ev = score_timeline(START_S + lo * INTERVAL_S, inp["y"][lo:hi], inp["present"][lo:hi],
                            inp["mu"][lo:hi], inp["log_se"][lo:hi], inp["day_alpha"][lo:hi],
                            inp["interval_alpha"][lo:hi], interval_s=INTERVAL_S,
                            cap=inp["cap"], thresholds=THRESHOLDS, warm_state=warm,
                            local_day=day)
        warm = ev.warm_state
        out.append(ev)
    return out


def flatten(prefix: str, ev: Any) -> dict[str, np.ndarray]:
    """The arrays of one Evidence under ``prefix``."""
    out = {f"{prefix}/expected": np.asarray(ev.expected), f"{prefix}/level": np.asarray(ev.level),
           f"{prefix}/warm_state": np.array(json.dumps(ev.warm_state.to_dict()))}
    for kind in KINDS:
        out[f"{prefix}/flag/{kind}"] = np.asarray(ev.flag[kind])
        out[f"{prefix}/log_p/{kind}"] = np.asarray(ev.log_p[kind])
    return out


def all_outputs() -> dict[str, np.ndarray]:
    """Every recorded array, keyed ``case/chunk/field``."""
    out: dict[str, np.ndarray] = {}
    for name in CASES:
        inp = case_inputs(name)
        for c, ev in enumerate(score_chunks(inp)):
            out.update(flatten(f"{name}/{c}", ev))
    return out


if __name__ == "__main__":
    np.savez_compressed(OUT, **all_outputs())
    print(f"wrote {OUT}")
