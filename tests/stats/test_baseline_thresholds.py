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


def test_pool_alphas_weighs_estimates_by_information_and_inflates_for_uncertainty():
    """Partial pooling: the pooled value is the information-weighted mean; each estimate moves
    toward it by prior_dof / (own information + prior_dof); the result is scaled by
    nu / (nu - 2) (Student-t predictive variance, BDA 3rd ed. sec. 3.2); never below floor."""
    big = 1e12  # counts so large that count noise takes no information away
    pooled, shrunk = bl.pool_alphas([0.03, 0.0], [39.0, 7.0], [big, big], prior_dof=10.0,
                                    floor=0.0025)
    assert pooled == pytest.approx((39 * 0.03 + 7 * 0.0) / 46)
    nu_wd, nu_we = 49.0, 17.0
    assert shrunk[0] == pytest.approx((39 * 0.03 + 10 * pooled) / nu_wd * nu_wd / (nu_wd - 2))
    assert shrunk[1] == pytest.approx((10 * pooled) / nu_we * nu_we / (nu_we - 2))
    # quiet counts (mean 50 per day) carry less information about alpha: more shrinkage
    _, quiet = bl.pool_alphas([0.03, 0.0], [39.0, 7.0], [50.0, 50.0], prior_dof=10.0)
    assert quiet[1] > shrunk[1]
    assert bl.pool_alphas([0.0, 0.0], [39.0, 7.0], [big, big], prior_dof=10.0,
                          floor=0.0025)[1] == [0.0025, 0.0025]


def test_weekend_day_alpha_is_never_zeroed_and_shrinks_toward_the_weekdays():
    """Twelve quiet detectors with a true day-level alpha of 0.02 on every day type, 8 weeks:
    every weekend profile's day_alpha lies within 0.004-0.06 (a pre-test zeroed some of them,
    and 8 days alone scatter it over 0-0.07). Chance of failure: each shrunk estimate has a
    relative SD of about 35 %, so a value outside 0.2-3 times the truth is a 2.3-SD or larger
    event on the low side (about 1 % for each of 24, but the shared pooled part makes them
    move together; seeded)."""
    rng = np.random.default_rng(11)
    days = 56
    alphas = []
    for _ in range(12):
        hours = (np.arange(PER_DAY) + 0.5) * STEP / 3600
        rhythm = 0.2 + 4 * np.exp(-0.5 * ((hours - 12) / 3) ** 2)
        g = rng.gamma(50.0, 1 / 50.0, days)
        t = MONDAY + np.arange(days * PER_DAY) * STEP
        counts = rng.poisson(np.tile(rhythm, days) * np.repeat(g, PER_DAY))
        base = bl.fit_baseline(t, counts, interval_s=STEP, timezone="UTC",
                               as_of_s=int(t[-1] + STEP), window_days=days).baseline
        alphas += [base.profiles[n].day_alpha for n in ("saturday", "sunday_holiday")]
    assert min(alphas) >= 0.004 and max(alphas) <= 0.06, alphas


def test_thresholds_hold_back_an_estimation_allowance_that_shrinks_with_history():
    """The calibration spends F D / (D + 10) of the budget F (D days of history) and the
    thresholds still say they were made for F (so stored ones are recognised)."""
    from service.stats.baseline_thresholds import (
        ESTIMATION_ALLOWANCE_DAYS,
        budget_spent,
        thresholds_for_baseline,
    )

    assert budget_spent(0.05, 21) == pytest.approx(0.05 * 21 / (21 + ESTIMATION_ALLOWANCE_DAYS))
    assert budget_spent(0.05, 56) > budget_spent(0.05, 21)
    rng = np.random.default_rng(3)
    short, long_ = (_history(rng, days=d, missing=0.01) for d in (21, 56))
    spent = []
    for (t, counts, end), days in ((short, 21), (long_, 56)):
        base = bl.fit_baseline(t, counts, interval_s=STEP, timezone="UTC", as_of_s=end,
                               window_days=days).baseline
        th = thresholds_for_baseline(base, interval_s=STEP, false_alerts_per_week=0.05)
        assert th.false_alerts_per_week == 0.05
        spent.append(sum(th.expected_per_week.values()))
    # expected false alerts under the model add up to the spent part, not to F
    assert spent[0] == pytest.approx(budget_spent(0.05, 21), rel=0.05)
    assert spent[1] == pytest.approx(budget_spent(0.05, 56), rel=0.05)
