"""Specifications of service.stats.baseline_thresholds: what a fitted baseline hands to the
calibration (its typical week and its missing rate).

Random data come from seeded ``np.random.default_rng``; each statistical assertion states its
tolerance and how often it could fail by chance.
"""

from __future__ import annotations

import numpy as np
import pytest

from service.stats import baseline as bl
from service.stats.baseline_thresholds import MISSING_RATE_BOUNDS, missing_rate

STEP = 300
PER_DAY = 86_400 // STEP
MONDAY = 4 * 86_400  # 1970-01-05, a Monday (UTC)


def _history(rng, *, days, missing, wild_day=None):
    """UTC counts with two peaks, a gamma day factor, ``missing`` of intervals unreported at
    random, and optionally one day at four times its usual volume (trimmed by the fit)."""
    hours = (np.arange(PER_DAY) + 0.5) * STEP / 3600
    rhythm = 2 + 40 * np.exp(-0.5 * ((hours - 8) / 1.5) ** 2) + 50 * np.exp(
        -0.5 * ((hours - 17) / 2) ** 2)
    g = rng.gamma(50.0, 1 / 50.0, days)
    if wild_day is not None:
        g[wild_day] = 4.0
    t = MONDAY + np.arange(days * PER_DAY) * STEP
    counts = rng.poisson(np.tile(rhythm, days) * np.repeat(g, PER_DAY))
    keep = rng.random(t.size) >= missing
    return t[keep], counts[keep], int(t[-1] + STEP)


@pytest.mark.parametrize("days, wild_day", [(28, 10), (14, None)],
                         ids=["one_trimmed_day", "pooled_weekend"])
def test_missing_rate_counts_trimmed_and_pooled_days_in_its_schedule(days, wild_day):
    """The missing rate is unreported over scheduled intervals on the same usable days: a day
    the robust fit trimmed, or the days of a day type fitted from the pooled profile, leave it
    at the true 1 %, not negative (which the lower bound turned into 0.2 %)."""
    rng = np.random.default_rng(7)
    t, counts, end = _history(rng, days=days, missing=0.01, wild_day=wild_day)
    fit = bl.fit_baseline(t, counts, interval_s=STEP, timezone="UTC", as_of_s=end,
                          window_days=days)
    base = fit.baseline
    assert fit.status == "fitted"
    if wild_day is not None:
        assert base.days_trimmed == 1
    else:
        assert base.profiles["saturday"].fitted_from == "pooled"
    rate = missing_rate(base)
    assert rate > MISSING_RATE_BOUNDS[0]
    # 4,000-8,000 scheduled intervals at 1 %: binomial SD at most 0.16 points; the bounds
    # 0.5-1.5 % are 3 SD or more away (chance of a failure below 0.3 %).
    assert 0.005 <= rate <= 0.015
