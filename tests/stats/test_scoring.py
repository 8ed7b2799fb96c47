"""Specifications of service.stats tails, cusum, capacity, thresholds and timeline: exact tails,
CUSUM run lengths, capacity caps, the false-alert budget, and the timeline scorer on simulated
detectors.

Random data come from seeded ``np.random.default_rng``; each statistical assertion states its
tolerance and how often it could fail by chance.
"""

from __future__ import annotations

import dataclasses
import json
import math

import mpmath as mp
import numpy as np
import pytest
from scipy import signal, stats

from service.domain import KINDS
from service.stats.capacity import capacity_cap
from service.stats.cusum import cusum_alarm_rate, cusum_arl, cusum_increment, cusum_limit
from service.stats.tails import log_p_lower, log_p_upper, log_p_zero_run, log_pmf, surprise
from service.stats.thresholds import Thresholds, calibrate
from service.stats.timeline import WarmState, score_timeline

INTERVAL_S = 300
PER_DAY = 86400 // INTERVAL_S
PER_WEEK = 7 * PER_DAY


def count_episodes(ev, *, close_after: int) -> int:  # type: ignore[no-untyped-def]
    """Alert episodes as ``service.pipeline.score.episodes_from_rows`` forms them: flagged
    intervals of one kind, split by ``close_after`` or more unflagged ones (missing data by
    two hours of reporting, as there)."""
    from service.stats.episodes import NO_REPORTS_REOPEN_S

    total = 0
    for kind in KINDS:
        idx = np.flatnonzero(np.asarray(ev.flag[kind], bool))
        if idx.size:
            split = max(close_after, NO_REPORTS_REOPEN_S // INTERVAL_S) if kind == "no_reports" \
                else close_after
            total += 1 + int(np.sum(np.diff(idx) - 1 >= split))
    return total


# --------------------------------------------------------------------------------------------
# Simulated detectors
# --------------------------------------------------------------------------------------------


def week_profile(peak: float, *, night: float = 0.02) -> np.ndarray:
    """Expected vehicles per 5 min over a week (Mon-Fri two peaks, weekend one hump)."""
    h = (np.arange(PER_DAY) + 0.5) * INTERVAL_S / 3600.0
    weekday = (night + 0.55 * np.exp(-0.5 * ((h - 8.0) / 1.3) ** 2)
               + 0.6 * np.exp(-0.5 * ((h - 17.2) / 1.8) ** 2)
               + 0.35 * np.exp(-0.5 * ((h - 12.5) / 3.5) ** 2))
    weekend = night + 0.55 * np.exp(-0.5 * ((h - 13.5) / 3.5) ** 2)
    return peak * np.concatenate([weekday] * 5 + [weekend] * 2) / weekday.max()


DAY_ALPHA = 0.02  # gamma day factor, sd 14 %
HOUR_SD = 0.08  # lognormal hour factor, AR(1) from hour to hour
HOUR_RHO = 0.5
EPS_ALPHA = 0.01  # independent interval excess
LOG_SE = 0.03  # the baseline's own error, fixed per bin of the week
MISSING = 0.01
# What a baseline fitted with day factors would report as interval_alpha: the hour factor's
# variance is interval-level excess once the day's level is known.
INTERVAL_ALPHA = math.exp(HOUR_SD**2) * (1.0 + EPS_ALPHA) - 1.0


def simulate(rng, mu_week, *, weeks, detectors):
    """Counts (detectors, n) and present flags under day, hour and interval factors."""
    n = mu_week.size * weeks
    err = np.exp(rng.normal(0.0, LOG_SE, (detectors, mu_week.size)) - LOG_SE**2 / 2)
    mu_true = np.tile(mu_week * err, (1, weeks))
    day = np.repeat(rng.gamma(1 / DAY_ALPHA, DAY_ALPHA, (detectors, n // PER_DAY)), PER_DAY,
                    axis=1)
    shocks = rng.normal(size=(detectors, n // 12)) * math.sqrt(1 - HOUR_RHO**2)
    shocks[:, 0] = rng.normal(size=detectors)
    z = signal.lfilter([1.0], [1.0, -HOUR_RHO], shocks, axis=1)
    hour = np.repeat(np.exp(HOUR_SD * z - HOUR_SD**2 / 2), 12, axis=1)
    lam = mu_true * day * hour * rng.gamma(1 / EPS_ALPHA, EPS_ALPHA, (detectors, n))
    counts = rng.poisson(lam).astype(float)
    present = rng.random((detectors, n)) >= MISSING
    return counts, present


def score(counts, present, mu, thresholds, *, cap=10**6, warm_state=None, start_s=0):
    n = counts.size
    return score_timeline(start_s, counts, present, mu, LOG_SE, DAY_ALPHA, INTERVAL_ALPHA,
                          interval_s=INTERVAL_S, cap=cap, thresholds=thresholds,
                          warm_state=warm_state,
                          local_day=(start_s // INTERVAL_S + np.arange(n)) // PER_DAY)


def budget_thresholds(mu_week, false_alerts_per_week=0.05, **kw):
    return calibrate(false_alerts_per_week, interval_s=INTERVAL_S, mu_week=mu_week,
                     interval_alpha=INTERVAL_ALPHA, day_alpha=DAY_ALPHA, log_se=LOG_SE, **kw)


# --------------------------------------------------------------------------------------------
# Tail probabilities against mpmath
# --------------------------------------------------------------------------------------------

mp.mp.dps = 60


def mp_poisson(y, m):
    """Reference tails from mpmath's regularized incomplete gamma at 60 digits."""
    y, m = mp.mpf(y), mp.mpf(m)
    lower = mp.gammainc(y + 1, m, mp.inf, regularized=True)
    upper = mp.mpf(1) if y == 0 else mp.gammainc(y, 0, m, regularized=True)
    return float(mp.log(lower)), float(mp.log(upper))


def mp_negative_binomial(y, m, a):
    """Reference tails from mpmath's regularized incomplete beta at 60 digits."""
    y, m, a = mp.mpf(y), mp.mpf(m), mp.mpf(a)
    r = 1 / a
    p, q = r / (r + m), m / (r + m)
    lower = mp.betainc(r, y + 1, 0, p, regularized=True)
    upper = mp.mpf(1) if y == 0 else mp.betainc(y, r, 0, q, regularized=True)
    return float(mp.log(lower)), float(mp.log(upper))


def mp_direct_sum(y, m, a, *, upper):
    """Reference tail by a direct 60-digit sum of pmf terms outward from y."""
    y, m, a = int(y), mp.mpf(m), mp.mpf(a)
    if a == 0:
        log_first = y * mp.log(m) - m - mp.loggamma(y + 1)
    else:
        r = 1 / a
        log_first = (mp.loggamma(y + r) - mp.loggamma(r) - mp.loggamma(y + 1)
                     + r * mp.log(r / (r + m)) + y * mp.log(m / (r + m)))
    term, total, k = mp.mpf(1), mp.mpf(1), y
    while True:
        if upper:
            ratio = m / (k + 1) if a == 0 else (m / (1 / a + m)) * (k + 1 / a) / (k + 1)
            k += 1
        else:
            if k == 0:
                break
            ratio = k / m if a == 0 else k / ((k - 1 + 1 / a) * (m / (1 / a + m)))
            k -= 1
        term *= ratio
        total += term
        if term < total * mp.mpf(10) ** -40:
            break
    return float(log_first + mp.log(total))


def close_in_log(got, want, rel=1e-12):
    return abs(got - want) <= rel * max(1.0, abs(want))


POISSON_CASES = [
    (3, 5.0), (12, 5.0), (40, 5.0),  # ordinary and p < 1e-12 upper tails
    (300, 5.0),  # p ~ 1e-407, far below double precision
    (0, 1000.0),  # e^-1000 ~ 1e-434
    (900, 1000.0), (1000, 1000.0), (1200, 1000.0), (1500, 1000.0),  # large means
    (2500, 5000.0),  # lower tail ~ 1e-335
    (7000, 5000.0),
    (1, 0.01), (30, 0.01), (500, 0.3),  # night-time means, p down to 1e-1396
]

NB_CASES = [
    (0, 5.0, 0.1), (30, 5.0, 0.1), (300, 5.0, 0.1), (3000, 5.0, 0.1),
    (0, 1000.0, 0.01), (200, 1000.0, 0.01), (4000, 1000.0, 0.01),
    (0, 1e4, 1e-4), (5, 50.0, 2.0), (2000, 50.0, 2.0), (0, 3000.0, 1e-6),
    (100, 100.0, 1e-12), (3, 100.0, 1e-12),  # alpha so small that 1 - p loses 12 digits
]


def test_poisson_tails_match_mpmath_far_below_double_range():
    """Poisson log tails agree with mpmath's incomplete gamma to 1e-12 relative, p to 1e-1396."""
    y = np.array([c[0] for c in POISSON_CASES], dtype=float)
    m = np.array([c[1] for c in POISSON_CASES])
    lower, upper = log_p_lower(y, m), log_p_upper(y, m)
    for i, (yy, mm) in enumerate(POISSON_CASES):
        ref_lo, ref_hi = mp_poisson(yy, mm)  # mpmath.gammainc, 60 digits
        assert close_in_log(lower[i], ref_lo), (yy, mm, lower[i], ref_lo)
        assert close_in_log(upper[i], ref_hi), (yy, mm, upper[i], ref_hi)
    assert upper[3] < -900 and lower[4] < -999  # beyond what scipy's sf/cdf can represent
    assert stats.poisson.sf(299, 5.0) == 0.0  # the reason for log-space summation


def test_negative_binomial_tails_match_mpmath():
    """NB log tails agree with mpmath's incomplete beta to 1e-12 relative (tiny alpha too)."""
    y = np.array([c[0] for c in NB_CASES], dtype=float)
    m = np.array([c[1] for c in NB_CASES])
    a = np.array([c[2] for c in NB_CASES])
    lower, upper = log_p_lower(y, m, a), log_p_upper(y, m, a)
    for i, (yy, mm, aa) in enumerate(NB_CASES):
        ref_lo, ref_hi = mp_negative_binomial(yy, mm, aa)  # mpmath.betainc, 60 digits
        assert close_in_log(lower[i], ref_lo), (yy, mm, aa, lower[i], ref_lo)
        assert close_in_log(upper[i], ref_hi), (yy, mm, aa, upper[i], ref_hi)


@pytest.mark.parametrize(("y", "m", "a", "upper"), [
    (20000, 1000.0, 0.01, True),  # p ~ 1e-661
    (8000, 1e4, 1e-4, False), (13000, 1e4, 1e-4, True),
    (2000, 3000.0, 1e-6, False), (4000, 3000.0, 1e-6, True),
    (1_005_000, 1e6, 0.0, True),  # scipy's gammainc is 4.6e-6 off here
    (1_005_000, 1e6, 1e-8, True),
    (995_000, 1e6, 1e-8, False),
    (202_000, 2e5, 1e-6, True),
])
def test_large_mean_tails_match_direct_high_precision_sum(y, m, a, upper):
    """Tails of means from 1,000 to 1e6 agree with a 60-digit direct sum of pmf terms (used
    where mpmath's incomplete beta takes tens of seconds) to 1e-12 relative in log p."""
    got = (log_p_upper if upper else log_p_lower)(y, m, a)[()]
    assert close_in_log(got, mp_direct_sum(y, m, a, upper=upper))


def test_log_pmf_matches_mpmath():
    """The saddle-point log pmf agrees with mpmath's log-gamma form to 1e-13 relative."""
    cases = [(0, 5.0, 0.0), (7, 5.0, 0.0), (1_000_300, 1e6, 0.0), (40, 5.0, 0.3),
             (10_100, 1e4, 1e-7), (2, 0.01, 0.02), (0, 300.0, 0.05)]
    for y, m, a in cases:
        y_, m_ = mp.mpf(y), mp.mpf(m)
        if a == 0:
            ref = y_ * mp.log(m_) - m_ - mp.loggamma(y_ + 1)
        else:
            r = 1 / mp.mpf(a)
            ref = (mp.loggamma(y_ + r) - mp.loggamma(r) - mp.loggamma(y_ + 1)
                   + r * mp.log(r / (r + m_)) + y_ * mp.log(m_ / (r + m_)))
        assert close_in_log(log_pmf(y, m, a)[()], float(ref), rel=1e-13), (y, m, a)


def test_tails_are_vectorised_and_broadcast():
    """Arrays of any shape broadcast; zero counts give an upper tail of exactly 1."""
    y = np.arange(12.0).reshape(3, 4)
    lo, hi = log_p_lower(y, 4.0, [[0.0], [0.05], [1.0]]), log_p_upper(y, 4.0, 0.0)
    assert lo.shape == hi.shape == (3, 4)
    assert hi[0, 0] == 0.0
    np.testing.assert_allclose(np.exp(lo[0]), stats.poisson.cdf(y[0], 4.0), rtol=1e-13)


def test_surprise_is_minus_log10_p():
    """Surprise is -log10 p: p = 1e-300 scores 300."""
    assert surprise(math.log(1e-300)) == pytest.approx(300.0, rel=1e-12)


def test_zero_hour_at_9_3_vehicles_per_hour_hand_computation():
    """At 9.3 veh/h P(no vehicle in an hour) = e^-9.3 = 9.14e-5 (hand computation, no source)."""
    assert math.exp(log_p_lower(0, 9.3)[()]) == pytest.approx(9.14e-5, rel=1e-3)
    twelve = np.full(12, 9.3 / 12)  # the same hour as twelve 5-min intervals
    assert math.exp(log_p_zero_run(twelve)) == pytest.approx(9.14e-5, rel=1e-3)


def test_zero_run_under_shared_gamma_factor_is_the_negative_binomial_zero():
    """A shared gamma factor gives exactly (1 + alpha sum mu)^(-1/alpha) (its Laplace transform)."""
    mu = np.array([2.0, 3.5, 1.25])
    for alpha in (0.02, 0.5):
        want = -math.log1p(alpha * mu.sum()) / alpha
        assert log_p_zero_run(mu, shared_alpha=alpha) == pytest.approx(want, rel=1e-12)


@pytest.mark.parametrize(("mu", "shared", "excess", "rel"), [
    (np.full(6, 4.0), 0.02, 0.02, 0.01),
    (np.full(6, 4.0), 0.05, 0.05, 0.025),
    (np.full(24, 1.0), 0.05, 0.05, 0.01),
    (np.full(50, 0.3), 0.05, 0.2, 0.01),
    (np.array([20.0, 18.0, 22.0]), 0.05, 0.05, 0.08),
])
def test_zero_run_with_interval_excess_is_conservative_and_close(mu, shared, excess, rel):
    """With both a shared level and independent interval excess, the moment-matched run
    probability never understates the exact mixture (scipy quad over the gamma level) and is
    within the stated share of its log p (1-2.5 % for realistic dispersion; 8 % when a few
    large expectations dominate, where p ~ e^-24 is conclusive either way)."""
    from scipy import integrate

    def integrand(d):  # E over a Gamma(1/shared) level of prod_i NB zero probabilities
        return (stats.gamma.pdf(d, 1 / shared, scale=shared)
                * np.prod((1 + excess * d * mu) ** (-1 / excess)))

    exact = math.log(integrate.quad(integrand, 0, 6, points=[1.0], limit=400, epsabs=0)[0])
    approx = log_p_zero_run(mu, interval_alpha=excess, shared_alpha=shared)
    assert exact <= approx <= exact * (1 - rel)


# --------------------------------------------------------------------------------------------
# CUSUM
# --------------------------------------------------------------------------------------------


def test_cusum_increment_is_the_log_likelihood_ratio():
    """Increments equal scipy's log pmf ratio for rate rho*m against m (Poisson and NB)."""
    y = np.arange(0, 60.0)
    for m, a, rho in [(12.0, 0.0, 0.5), (12.0, 0.0, 2.0), (30.0, 0.04, 0.5), (0.3, 0.1, 2.0)]:
        if a == 0:
            ref = stats.poisson.logpmf(y, rho * m) - stats.poisson.logpmf(y, m)
        else:
            r = 1 / a
            ref = (stats.nbinom.logpmf(y, r, r / (r + rho * m))
                   - stats.nbinom.logpmf(y, r, r / (r + m)))
        np.testing.assert_allclose(cusum_increment(y, m, rho=rho, alpha=a), ref, rtol=1e-10,
                                   atol=1e-10)


def integer_cusum_arl(h: int, k: int, mu: float) -> float:
    """Exact ARL of Lucas's integer Poisson CUSUM S = max(0, S + y - k), alarm S >= h, from 0
    (states 0..h-1; an independent construction of the chain)."""
    pmf = stats.poisson.pmf(np.arange(h + k + 1), mu)
    cdf = stats.poisson.cdf
    p = np.zeros((h, h))
    for i in range(h):
        for j in range(h):
            if j == 0:
                p[i, 0] = cdf(k - i, mu)  # y <= k - i
            else:
                y = j - i + k
                p[i, j] = pmf[y] if 0 <= y < pmf.size else 0.0
    return float(np.linalg.solve(np.eye(h) - p, np.ones(h))[0])


def test_cusum_chain_is_exact_on_an_integer_lattice():
    """With rho = e and mu (rho - 1) an integer k, increments are integers y - k and the chain
    with one state per unit equals the exact integer-state ARL (Brook & Evans 1972) to 1e-7
    (the chain adds 1e-13 absorption per step to stay invertible: ARL * 1e-13 relative)."""
    for k, h in [(3, 8), (5, 12)]:
        mu = k / (math.e - 1)
        got = cusum_arl(h, rho=math.e, mu=mu, states=h)[()]
        assert got == pytest.approx(integer_cusum_arl(h, k, mu), rel=1e-7)


def simulate_arl(rng, h, *, rho, mu, alpha, runs):
    """Monte Carlo run lengths of the CUSUM from 0 (independent of the chain)."""
    s = np.zeros(runs)
    alive = np.ones(runs, dtype=bool)
    length = np.zeros(runs)
    t = 0
    while alive.any():
        t += 1
        k = int(alive.sum())
        lam = mu * rng.gamma(1 / alpha, alpha, k) if alpha > 0 else np.full(k, mu)
        z = cusum_increment(rng.poisson(lam), mu, rho=rho, alpha=alpha)
        s[alive] = np.maximum(0.0, s[alive] + z)
        done = np.flatnonzero(alive)[s[alive] >= h]
        length[done] = t
        alive[done] = False
    return length


@pytest.mark.parametrize(("rho", "mu", "alpha", "h"), [
    (0.5, 4.0, 0.0, 3.0), (2.0, 4.0, 0.0, 3.0), (2.0, 0.3, 0.0, 3.0),
    (0.5, 30.0, 0.05, 4.0), (2.0, 30.0, 0.05, 4.0),
])
def test_cusum_arl_matches_monte_carlo(rho, mu, alpha, h):
    """Markov-chain ARL within 7 % of 4,000 simulated run lengths (Monte Carlo standard error
    under 1.7 %, chain discretisation about 2 %: a chance failure needs a 3-sigma draw)."""
    rng = np.random.default_rng(1985)
    runs = simulate_arl(rng, h, rho=rho, mu=mu, alpha=alpha, runs=4000)
    assert cusum_arl(h, rho=rho, mu=mu, alpha=alpha)[()] == pytest.approx(runs.mean(), rel=0.07)
    # No Lucas (1985) table value is used: none is remembered reliably enough to cite.


def test_cusum_arl_respects_lordens_bound():
    """For exact log-likelihood-ratio increments ARL0 >= e^h (Lorden 1971)."""
    for rho in (0.5, 2.0):
        for mu, alpha in [(0.05, 0.0), (2.0, 0.0), (50.0, 0.0), (20.0, 0.03)]:
            for h in (2.0, 5.0):
                assert cusum_arl(h, rho=rho, mu=mu, alpha=alpha)[()] >= math.exp(h)


def simulate_weekly_alarms(rng, h, *, rho, mu_week, weeks):
    """Alarms per week of the resetting CUSUM run over the real periodic sequence."""
    s = np.zeros(weeks)
    alarms = 0
    for rep in range(2):  # a burn-in week, then the counted week
        for m in mu_week:
            s = np.maximum(0.0, s + cusum_increment(rng.poisson(m, weeks), m, rho=rho))
            hit = s >= h
            alarms += int(hit.sum()) if rep else 0
            s[hit] = 0.0
    return alarms / weeks


@pytest.mark.parametrize("rho", [0.5, 2.0])
def test_alarm_rate_over_a_weekly_profile_matches_simulation(rho):
    """The quasi-static alarm rate behind h is within 15 % of 400 simulated weeks of the real
    time-varying sequence (about 800 alarms: Poisson error 3.5 %, so a 4-sigma miss)."""
    mu_week = week_profile(120.0)[::2]  # 10-min bins keep the simulation short
    h = cusum_limit(mu_week.size / 2.0, rho=rho, mu=mu_week)  # 2 alarms per week
    assert cusum_alarm_rate(h, rho=rho, mu=mu_week) * mu_week.size == pytest.approx(2.0,
                                                                                    rel=0.02)
    rng = np.random.default_rng(72)
    simulated = simulate_weekly_alarms(rng, h, rho=rho, mu_week=mu_week, weeks=400)
    assert simulated == pytest.approx(2.0, rel=0.15)


# --------------------------------------------------------------------------------------------
# Capacity caps
# --------------------------------------------------------------------------------------------


def test_capacity_caps_follow_highway_capacity_manual():
    """Base capacities per lane-hour: freeway 2,400 pc/h/ln (HCM 2000 table at FFS >= 70 mph;
    HCM 6th ed. 2,200 + 10(FFS - 50) capped at 2,400), signalized saturation flow 1,900
    pc/h/ln (HCM 2000 and 6th ed.), local roads the signalized figure. From memory."""
    assert capacity_cap("freeway", lanes=1, interval_s=3600, margin=1.0) == 2400
    assert capacity_cap("arterial", lanes=1, interval_s=3600, margin=1.0) == 1900
    assert capacity_cap("local", lanes=1, interval_s=3600, margin=1.0) == 1900


def test_capacity_cap_scales_with_lanes_interval_margin_and_override():
    """The cap is hourly capacity x margin (1.5 by default, common practice) x lanes x interval."""
    assert capacity_cap("freeway", lanes=3, interval_s=300) == 900  # 2400*1.5*3/12
    assert capacity_cap("arterial", lanes=2, interval_s=20) == 32  # ceil(1900*1.5*2/180)
    assert capacity_cap("freeway", lanes=1, interval_s=300, per_lane_hourly=3000,
                        margin=1.0) == 250  # the archived-data rule of thumb scaled to 5 min
    with pytest.raises(ValueError):
        capacity_cap("runway", lanes=1, interval_s=300)


# --------------------------------------------------------------------------------------------
# False-alert budget
# --------------------------------------------------------------------------------------------


def test_thresholds_split_the_budget_bonferroni_style():
    """Without a profile each family's share F/5 over the week's intervals sets its alpha, the
    CUSUM limit is log ARL0 (Lorden's conservative bound) and no_reports needs a run of q^L."""
    th = calibrate(0.05, interval_s=INTERVAL_S, missing_rate=0.01)
    assert th.log_alpha_zero_run == pytest.approx(math.log(0.05 * 0.2 / PER_WEEK))
    assert th.log_alpha_low == pytest.approx(math.log(0.05 * 0.1 / PER_WEEK))
    assert th.h_low == pytest.approx(math.log(PER_WEEK / (0.05 * 0.1)))
    assert th.missing_run == 3  # 2016 * 0.99 * 0.01^3 = 0.002 <= 0.01 < 0.2 at L = 2
    assert sum(th.expected_per_week.values()) <= 0.05 + 1e-12


def test_thresholds_spend_the_whole_budget_with_a_profile():
    """With the week's expectations, discrete tests' unspent share moves to the CUSUMs so the
    expected false alerts add up to F, and h falls below Lorden's log ARL0."""
    mu_week = week_profile(30.0)
    th = budget_thresholds(mu_week, 0.05)
    assert sum(th.expected_per_week.values()) == pytest.approx(0.05, rel=1e-6)
    assert th.expected_per_week["low_volume_cusum"] > 0.05 * 0.1
    assert th.h_low < math.log(PER_WEEK / (0.05 * 0.1))


@pytest.mark.slow
def test_false_alert_rate_within_factor_two_of_budget_in_simulation():
    """Normal traffic with gamma day factors, AR(1) hour factors, interval excess, baseline
    error and 1 % ragged data: false alert episodes per detector-week are within a factor of 2
    of F = 1 on busy, medium and quiet detectors (60 detector-weeks each; the expected count 60
    has Poisson sd 8, so a chance failure needs a 4-sigma draw even at a realised 0.7 F)."""
    rng = np.random.default_rng(20240605)
    for peak in (120.0, 30.0, 5.0):
        mu_week = week_profile(peak)
        th = budget_thresholds(mu_week, 1.0)
        counts, present = simulate(rng, mu_week, weeks=6, detectors=10)
        mu = np.tile(mu_week, 6)
        episodes = 0
        for y, p in zip(counts, present, strict=True):
            ev = score(y, p, mu, th, cap=capacity_cap("arterial", lanes=2, interval_s=300))
            episodes += count_episodes(ev, close_after=3)
        rate = episodes / 60
        assert 0.5 <= rate <= 2.0, (peak, rate)


# --------------------------------------------------------------------------------------------
# Timeline scorer
# --------------------------------------------------------------------------------------------


def normal_detector(seed, peak, weeks):
    rng = np.random.default_rng(seed)
    mu_week = week_profile(peak)
    counts, present = simulate(rng, mu_week, weeks=weeks, detectors=1)
    return counts[0], present[0], np.tile(mu_week, weeks), mu_week


@pytest.mark.slow
def test_chunked_scoring_is_identical_to_one_call():
    """Scoring in chunks, passing a JSON round trip of warm_state, gives bit-identical output."""
    y, present, mu, mu_week = normal_detector(3, 40.0, 3)
    y[3000:3040] = 0  # a dead stretch and a frozen one so that runs cross chunk boundaries
    y[4100:4130] = 17
    th = budget_thresholds(mu_week, 1.0)
    whole = score(y, present, mu, th)
    cuts = [0, 1, 777, 3010, 3011, 4115, 4200, y.size]
    state, parts = None, []
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        ev = score(y[a:b], present[a:b], mu[a:b], th, warm_state=state, start_s=a * INTERVAL_S)
        state = WarmState.from_dict(json.loads(json.dumps(ev.warm_state.to_dict())))
        parts.append(ev)
    for kind in KINDS:
        assert np.array_equal(np.concatenate([p.flag[kind] for p in parts]), whole.flag[kind])
        assert np.array_equal(np.concatenate([p.log_p[kind] for p in parts]), whole.log_p[kind])
    assert np.array_equal(np.concatenate([p.expected for p in parts]), whole.expected)
    assert whole.flag["zero_counts"][3000:3040].any() and whole.flag["repeated_value"].any()


def test_warm_state_must_continue_the_timeline():
    """A warm state from elsewhere in time is refused rather than silently misapplied."""
    y, present, mu, mu_week = normal_detector(4, 10.0, 1)
    th = budget_thresholds(mu_week)
    ev = score(y[:100], present[:100], mu[:100], th)
    with pytest.raises(ValueError):
        score(y[101:200], present[101:200], mu[101:200], th, warm_state=ev.warm_state,
              start_s=101 * INTERVAL_S)


def tmg_zero_hours_rule(counts):
    """FHWA Traffic Monitoring Guide volume QC: flag at 7 or more consecutive zero hours.
    Returns the index of the interval at which the rule first fires, or None."""
    hourly = counts[: counts.size // 12 * 12].reshape(-1, 12).sum(axis=1)
    run = 0
    for hour, total in enumerate(hourly):
        run = run + 1 if total == 0 else 0
        if run >= 7:
            return (hour + 1) * 12 - 1
    return None


@pytest.mark.slow
def test_dead_detector_on_busy_road_flagged_in_minutes_where_tmg_rule_needs_seven_hours():
    """A busy arterial's detector dies at 07:00 on a Wednesday: the scorer raises zero_counts
    within 30 min; the FHWA Traffic Monitoring Guide's 7-consecutive-zero-hours check (common practice) fires 7 h later at the earliest."""
    y, present, mu, mu_week = normal_detector(5, 120.0, 2)
    dead = PER_WEEK + 2 * PER_DAY + 7 * 12
    y[dead:] = 0
    present[dead:] = True
    ev = score(y, present, mu, budget_thresholds(mu_week))
    first = dead + int(np.argmax(ev.flag["zero_counts"][dead:]))
    assert ev.flag["zero_counts"][first]
    assert (first - dead + 1) * INTERVAL_S <= 30 * 60
    assert not ev.any_flag[dead - 12:dead].any()
    fired = tmg_zero_hours_rule(y)
    assert fired is not None and (fired - dead + 1) * INTERVAL_S >= 7 * 3600


@pytest.mark.slow
def test_quiet_rural_nights_with_normal_zeros_raise_nothing_unlike_any_zero_hour_rule():
    """A quiet rural detector (a few vehicles an hour at night) has many zero hours a naive
    'any zero hour' rule would flag; the scorer raises no zero_counts episode in two weeks. The
    model's expected zero_counts false alerts for the fortnight bound the chance of failure."""
    y, present, mu, mu_week = normal_detector(6, 3.0, 2)
    present[:] = True
    th = budget_thresholds(mu_week)
    ev = score(y, present, mu, th)
    zero_hours = int((y.reshape(-1, 12).sum(axis=1) == 0).sum())
    assert zero_hours >= 20
    assert not ev.flag["zero_counts"].any()
    assert 2 * th.expected_per_week["zero_counts"] < 0.01  # chance of a false failure < 1 %


@pytest.mark.slow
def test_chattering_detector_flags_high_volume_and_over_capacity():
    """Counts tripled by crosstalk on a 2-lane arterial: high_volume over most of the fault,
    and over_capacity where the tripled count passes the HCM-based cap (475 per 5 min)."""
    y, present, mu, mu_week = normal_detector(7, 180.0, 2)
    cap = capacity_cap("arterial", lanes=2, interval_s=INTERVAL_S)
    start = PER_WEEK + PER_DAY + 6 * 12
    fault = slice(start, start + 12 * 12)
    y[fault] *= 3
    ev = score(y, present, mu, budget_thresholds(mu_week), cap=cap)
    assert ev.flag["high_volume"][fault][present[fault]].mean() > 0.9
    over = present[fault] & (y[fault] > cap)
    assert over.any() and np.array_equal(ev.flag["over_capacity"][fault], over)
    assert not ev.flag["over_capacity"][: start].any()


@pytest.mark.slow
def test_frozen_value_flags_repeated_value():
    """A controller repeating 37 every 5 min from 10:00 is flagged repeated_value within the
    fault's first six intervals; a normal fortnight before has no such flag."""
    y, present, mu, mu_week = normal_detector(8, 60.0, 2)
    start = PER_WEEK + 3 * PER_DAY + 10 * 12
    y[start:start + 24] = 37
    present[start:start + 24] = True
    ev = score(y, present, mu, budget_thresholds(mu_week))
    assert ev.flag["repeated_value"][start:start + 6].any()
    assert ev.flag["repeated_value"][start + 6:start + 24].all()
    assert not ev.flag["repeated_value"][:start].any()


@pytest.mark.slow
def test_one_lane_dead_flags_low_volume_and_level_does_not_absorb_it():
    """A station summing two lanes loses one at 07:00 (counts halve): low_volume covers most of
    the 10-hour fault, and because flagged intervals are left out the level estimate stays near
    normal instead of learning the fault as a quiet day."""
    y, present, mu, mu_week = normal_detector(9, 60.0, 2)
    start = PER_WEEK + 2 * PER_DAY + 7 * 12
    fault = slice(start, start + 120)
    y[fault] = np.floor(y[fault] / 2)
    ev = score(y, present, mu, budget_thresholds(mu_week))
    assert ev.flag["low_volume"][fault][present[fault]].mean() > 0.8
    assert ev.level[fault].min() > 0.75


@pytest.mark.slow
def test_gap_flags_no_reports_once_improbable_and_lone_missing_interval_is_nothing():
    """A 6-interval gap raises no_reports from its L-th interval (q^L below the budget share);
    lone missing intervals every hour raise nothing at all."""
    y, present, mu, mu_week = normal_detector(10, 30.0, 1)
    present[:] = True
    present[::12] = False  # a lone missing interval every hour
    gap = 3 * PER_DAY + 9 * 12 + 5
    present[gap:gap + 6] = False
    th = budget_thresholds(mu_week)
    ev = score(y, present, mu, th)
    flagged = np.flatnonzero(ev.flag["no_reports"])
    assert flagged.tolist() == list(range(gap + th.missing_run - 1, gap + 6))
    lone = ~present & ~np.isin(np.arange(y.size), np.arange(gap - 1, gap + 7))
    assert not ev.any_flag[lone].any()


def test_inputs_are_validated():
    """Negative counts, non-positive expectations and mismatched lengths are refused."""
    th = calibrate(0.05, interval_s=INTERVAL_S)
    ok = dict(interval_s=INTERVAL_S, cap=100, thresholds=th)
    with pytest.raises(ValueError):
        score_timeline(0, [1, -1], [True, True], 1.0, 0.0, 0.0, 0.0, **ok)
    with pytest.raises(ValueError):
        score_timeline(0, [1, 1], [True, True], [1.0, 0.0], 0.0, 0.0, 0.0, **ok)
    with pytest.raises(ValueError):
        score_timeline(0, [1, 1, 1], [True, True], 1.0, 0.0, 0.0, 0.0, **ok)
    with pytest.raises(ValueError):
        score_timeline(0, [1], [True], 1.0, 0.0, 0.0, 0.0, interval_s=60, cap=100, thresholds=th)


def test_thresholds_round_trip_through_json():
    """Stored thresholds (``dataclasses.asdict`` as JSON) rebuild an equal frozen value."""
    th = budget_thresholds(week_profile(40.0))
    again = Thresholds(**json.loads(json.dumps(dataclasses.asdict(th))))
    assert again == th
    assert dict(again.expected_per_week) == dict(th.expected_per_week)
    with pytest.raises(dataclasses.FrozenInstanceError):
        th.h_low = 1.0
