"""Specifications of the repeated-value evidence: a repetition is what is judged, not an
unlikely value (``thresholds.log_repeat_p``, its use in ``timeline`` and its calibration).

Random data come from seeded ``np.random.default_rng``; each statistical assertion states its
tolerance and how often it could fail by chance.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special, stats

from service.stats.thresholds import calibrate, log_repeat_p
from service.stats.timeline import score_timeline

STEP = 300
PER_DAY = 86_400 // STEP


@pytest.mark.parametrize("mu", [0.3, 2.0, 15.0, 80.0, 400.0, 2000.0])
def test_poisson_repeat_probability_matches_the_bessel_series(mu):
    """For Poisson, sum_v p(v)^2 = exp(-2 mu) I0(2 mu) (Abramowitz & Stegun 9.6.10); without
    v = 0 and given a nonzero first count: (i0e(2 mu) - e^(-2 mu)) / (1 - e^(-mu)). Exact
    sum below the normal-limit SD, within 1 % above it."""
    reference = math.log((special.i0e(2 * mu) - math.exp(-2 * mu)) / -math.expm1(-mu))
    got = float(log_repeat_p(mu, 0.0))
    tolerance = 1e-9 if math.sqrt(mu) <= 20 else 0.01
    assert got == pytest.approx(reference, abs=tolerance)


@pytest.mark.parametrize("mu, alpha", [(1.5, 0.3), (12.0, 0.05), (60.0, 0.02), (300.0, 0.05)])
def test_negative_binomial_repeat_probability_matches_a_direct_sum(mu, alpha):
    """For NB2 the collision probability matches a direct sum of scipy's nbinom pmf (exact
    sum below the normal-limit SD, within 1 % above it)."""
    r = 1 / alpha
    v = np.arange(0, int(mu + 40 * math.sqrt(mu + alpha * mu * mu)) + 50)
    pmf = stats.nbinom.pmf(v, r, r / (r + mu))
    reference = math.log(np.sum(pmf[1:] ** 2) / (1 - pmf[0]))
    sd = math.sqrt(mu + alpha * mu * mu)
    got = float(log_repeat_p(mu, alpha))
    assert got == pytest.approx(reference, abs=1e-9 if sd <= 20 else 0.01)


def _score(counts, mu, thresholds):
    n = counts.size
    return score_timeline(0, counts.astype(float), np.ones(n, bool), np.full(n, mu), 0.03,
                          0.02, 0.01, interval_s=STEP, cap=10**6, thresholds=thresholds,
                          local_day=np.arange(n) // PER_DAY)


def test_a_level_drop_is_not_taken_for_a_repeating_controller():
    """At 20 vehicles expected, a drop to a few vehicles per interval (3, 3, 3, ...) makes the
    values unlikely but not their repetition: low_volume flags it, repeated_value does not
    until the run is long enough to be improbable as a run (the old evidence, P(3)^2 per
    triple, flagged at the third interval)."""
    th = calibrate(0.05, interval_s=STEP, mu_week=np.full(7 * PER_DAY, 20.0),
                   interval_alpha=0.01, day_alpha=0.02, log_se=0.03)
    rng = np.random.default_rng(5)
    counts = np.concatenate([rng.poisson(20.0, 120), [3, 3, 3, 5, 2, 4]])
    ev = _score(counts, 20.0, th)
    assert ev.flag["low_volume"][120:].any()
    assert not ev.flag["repeated_value"].any()


def test_a_lasting_level_drop_with_a_run_of_small_values_is_low_volume_only():
    """At 20 vehicles expected, the counts fall to about a third for four hours (a holiday
    nobody listed) and six in a row read 6. low_volume holds the drop alerted, so its
    intervals are kept out of the level the tail tests use (which stays near 1); the repeat
    is judged at the level the counts themselves show (about 0.3: spread of a count near 6,
    where a repeat has probability about 1 / (2 sqrt(pi) sqrt(6)) = 0.12), so six equal
    values are no frozen controller."""
    th = calibrate(0.05, interval_s=STEP, mu_week=np.full(7 * PER_DAY, 20.0),
                   interval_alpha=0.01, day_alpha=0.02, log_se=0.03)
    rng = np.random.default_rng(7)
    drop = rng.poisson(6.0, 48)
    drop[np.flatnonzero(drop[1:] == drop[:-1]) + 1] += 1  # the only run is the one below
    drop[30:36] = 6
    drop[29], drop[36] = 4, 8
    counts = np.concatenate([rng.poisson(20.0, 120), drop])
    ev = _score(counts, 20.0, th)
    assert ev.flag["low_volume"][130:].mean() > 0.8
    assert ev.level[150:].max() > 0.7  # the tail tests' level did not learn the drop
    assert not ev.flag["repeated_value"].any()


def test_a_frozen_count_is_flagged_once_its_run_is_improbable():
    """A controller repeating 21 at 20 vehicles expected is flagged within 12 intervals (each
    repeat has probability about 1 / (2 sqrt(pi) sd) = 0.06 here), and not before the run
    reaches min_repeat."""
    th = calibrate(0.05, interval_s=STEP, mu_week=np.full(7 * PER_DAY, 20.0),
                   interval_alpha=0.01, day_alpha=0.02, log_se=0.03)
    rng = np.random.default_rng(6)
    base = rng.poisson(20.0, 200)
    base[np.flatnonzero(base[1:] == base[:-1]) + 1] += 1  # no accidental runs before
    counts = np.concatenate([base, np.full(24, 21)])
    ev = _score(counts, 20.0, th)
    flagged = np.flatnonzero(ev.flag["repeated_value"])
    assert flagged.size and 200 + th.min_repeat - 1 <= flagged[0] < 212
    assert ev.flag["repeated_value"][212:].all()


def test_repeated_value_calibration_matches_simulated_runs():
    """The expected repeated-value alerts per week of the calibration match the rate of runs
    reaching the threshold in 400 simulated Poisson weeks at a quiet detector (mean 1.5), to
    within 25 % (the simulated count is about 400 x 0.01 x 20 runs' worth; the Poisson SD of
    the count of episodes, about 9 %, makes a 25 % miss a 3-SD event)."""
    mu = 1.5
    th = calibrate(1.0, interval_s=STEP, mu_week=np.full(7 * PER_DAY, mu))
    expected = th.expected_per_week["repeated_value"]
    rng = np.random.default_rng(8)
    weeks = 400
    y = rng.poisson(mu, weeks * 7 * PER_DAY)
    lr = float(log_repeat_p(mu, 0.0))
    k = max(th.min_repeat, 1 + math.ceil(th.log_alpha_repeat / lr))
    # runs of equal nonzero values of length >= k
    change = np.concatenate([[True], (y[1:] != y[:-1])])
    starts = np.flatnonzero(change)
    lengths = np.diff(np.concatenate([starts, [y.size]]))
    runs = int(np.sum((lengths >= k) & (y[starts] > 0)))
    assert expected > 0
    assert runs / weeks == pytest.approx(expected, rel=0.25)
