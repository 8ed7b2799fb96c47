"""Specifications of service.stats.baseline: time grid, profile fit, dispersion, intervals, fallbacks.

Every statistical check runs on seeded ``np.random.default_rng`` data. Tolerances are stated next
to each check with the chance of a failure by bad luck; outside references are named in comments.
"""

from __future__ import annotations

import json
import math
from datetime import date, datetime, timedelta
from zoneinfo import ZoneInfo

import holidays
import mpmath
import numpy as np
import pytest
import statsmodels.api as sm
from scipy import optimize, stats
from statsmodels.discrete.discrete_model import NegativeBinomial, Poisson

from service.stats import baseline as bl
from service.stats import calendar, dispersion, intervals, smoothing

CHICAGO = "America/Chicago"


# ---------------------------------------------------------------------------------------------
# helpers (kept here: tests/conftest.py belongs to the API tests)
# ---------------------------------------------------------------------------------------------


def _epoch(local_iso: str, timezone: str = CHICAGO) -> int:
    return int(datetime.fromisoformat(local_iso).replace(tzinfo=ZoneInfo(timezone)).timestamp())


def _bump(hours: np.ndarray, center: float, width: float) -> np.ndarray:
    return np.exp(-0.5 * ((hours - center) / width) ** 2)


def _rhythm(interval_s: int = 300, scale: float = 1.0) -> np.ndarray:
    """Invented arterial rhythm, vehicles per interval, rows = weekday, saturday, sunday_holiday.

    Weekday: morning and evening peaks, a midday plateau and a sharp 15-minute peak at
    15:00-15:15 (a shift change) at 1.8 times its surroundings.
    """
    n = 86_400 // interval_s
    hours = (np.arange(n) + 0.5) * interval_s / 3600.0
    weekday = 3 + 45 * _bump(hours, 12.5, 3.0) + 90 * _bump(hours, 7.75, 0.8) + 110 * _bump(
        hours, 17.25, 1.1
    )
    weekday = np.where((hours >= 15.0) & (hours < 15.25), 1.8 * weekday, weekday)
    saturday = 3 + 70 * _bump(hours, 13.0, 3.0)
    sunday = 2.5 + 50 * _bump(hours, 14.0, 3.0)
    return np.stack([weekday, saturday, sunday]) * scale * interval_s / 300.0


def _simulate(rng, *, start_local, end_local, rhythm, interval_s=300, timezone=CHICAGO,
              calendar="US", day_alpha=0.0, interval_alpha=0.0, missing=0.0):
    """Counts of a detector with gamma day factors and gamma interval factors.

    Local bins and day types are worked out element by element with the standard library
    (zoneinfo, datetime) and the holidays package, independently of the code under test.
    """
    zone = ZoneInfo(timezone)
    t = np.arange(_epoch(start_local, timezone), _epoch(end_local, timezone), interval_s)
    cal = holidays.country_holidays(calendar, years=range(2024, 2029)) if calendar else {}
    local = [datetime.fromtimestamp(int(s), zone) for s in t]
    bins = np.array([(d.hour * 3600 + d.minute * 60 + d.second) // interval_s for d in local])
    days = np.array([d.date().toordinal() for d in local])
    types = np.array([2 if (d.date() in cal or d.weekday() == 6) else int(d.weekday() == 5)
                      for d in local])
    unique_days, day_index = np.unique(days, return_inverse=True)
    g = rng.gamma(1 / day_alpha, day_alpha, unique_days.size) if day_alpha else np.ones(
        unique_days.size)
    h = rng.gamma(1 / interval_alpha, interval_alpha, t.size) if interval_alpha else 1.0
    lam = rhythm[types, bins]
    counts = rng.poisson(lam * g[day_index] * h)
    observed = rng.random(t.size) >= missing
    return {"t": t, "counts": counts, "lam": lam, "types": types, "bins": bins, "days": days,
            "g": g[day_index], "observed": observed}


def _cyclic_penalty_dense(n: int) -> np.ndarray:
    """P = D'D for the cyclic second difference, built from its definition."""
    d = np.zeros((n, n))
    for i in range(n):
        d[i, (i - 1) % n] += 1.0
        d[i, i] -= 2.0
        d[i, (i + 1) % n] += 1.0
    return d.T @ d


# ---------------------------------------------------------------------------------------------
# Local time grid
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("timezone", [CHICAGO, "Europe/London", "Asia/Kathmandu",
                                      "Australia/Lord_Howe", "UTC"])
def test_local_time_grid_matches_zoneinfo_element_by_element(timezone):
    """Bins, local dates and weekend day types agree with datetime.fromtimestamp per interval."""
    rng = np.random.default_rng(11)
    t = rng.integers(_epoch("2000-01-01T00:00", "UTC"), _epoch("2040-01-01T00:00", "UTC"), 4000)
    t = t - t % 60  # minute-aligned starts
    grid = calendar.local_time_grid(t, interval_s=900, timezone=timezone)
    zone = ZoneInfo(timezone)  # reference: Python's zoneinfo, one call per timestamp
    local = [datetime.fromtimestamp(int(s), zone) for s in t]
    want_bin = [(d.hour * 3600 + d.minute * 60 + d.second) // 900 for d in local]
    want_day = [d.date().toordinal() - date(1970, 1, 1).toordinal() for d in local]
    want_type = [2 if d.weekday() == 6 else int(d.weekday() == 5) for d in local]
    assert grid.bin.tolist() == want_bin
    assert grid.local_day.tolist() == want_day
    assert grid.day_type.tolist() == want_type


def test_spring_forward_day_lacks_an_hour_of_bins():
    """2026-03-08 in Chicago (clocks 02:00 -> 03:00) has 23 hours: bins 02:00-02:55 never occur."""
    t = np.arange(_epoch("2026-03-08T00:00"), _epoch("2026-03-09T00:00"), 300)
    assert t.size == 23 * 12
    grid = calendar.local_time_grid(t, interval_s=300, timezone=CHICAGO)
    counts = np.bincount(grid.bin, minlength=288)
    assert np.all(counts[24:36] == 0)
    assert np.all(np.delete(counts, np.arange(24, 36)) == 1)
    assert np.unique(grid.local_day).size == 1


def test_fall_back_day_maps_two_intervals_to_each_repeated_bin():
    """2026-11-01 in Chicago (clocks 02:00 -> 01:00) has 25 hours: bins 01:00-01:55 occur twice."""
    t = np.arange(_epoch("2026-11-01T00:00"), _epoch("2026-11-02T00:00"), 300)
    assert t.size == 25 * 12
    grid = calendar.local_time_grid(t, interval_s=300, timezone=CHICAGO)
    counts = np.bincount(grid.bin, minlength=288)
    assert np.all(counts[12:24] == 2)
    assert np.all(np.delete(counts, np.arange(12, 24)) == 1)
    assert grid.day_type[0] == 2  # a Sunday


def test_holidays_and_weekends_get_their_day_types():
    """Thanksgiving 2026-11-26 is sunday_holiday under "US", a weekday without; Sat is saturday."""
    days = ["2026-11-25", "2026-11-26", "2026-11-27", "2026-11-28", "2026-11-29"]
    t = np.array([_epoch(f"{d}T12:00") for d in days])
    with_us = calendar.local_time_grid(t, interval_s=300, timezone=CHICAGO, holiday_calendar="US")
    without = calendar.local_time_grid(t, interval_s=300, timezone=CHICAGO)
    assert [calendar.DAY_TYPES[c] for c in with_us.day_type] == [
        "weekday", "sunday_holiday", "weekday", "saturday", "sunday_holiday"]
    assert [calendar.DAY_TYPES[c] for c in without.day_type] == [
        "weekday", "weekday", "weekday", "saturday", "sunday_holiday"]
    # a state holiday from the subdivision calendar (holidays package: Colorado, Cabrini Day)
    cabrini = np.array([_epoch("2026-10-05T12:00", "America/Denver")])
    co = calendar.local_time_grid(cabrini, interval_s=300, timezone="America/Denver",
                            holiday_calendar="US-CO")
    assert co.day_type.tolist() == [2]


@pytest.mark.parametrize("kwargs, match", [
    ({"timezone": "Mars/Olympus_Mons"}, "unknown time zone"),
    ({"timezone": CHICAGO, "holiday_calendar": "XX"}, "unknown holiday calendar"),
    ({"timezone": CHICAGO, "holiday_calendar": "US-ZZ"}, "unknown holiday calendar"),
    ({"timezone": CHICAGO, "interval_s": 7}, "divide one hour"),
])
def test_bad_time_zone_calendar_or_interval_raise_value_error(kwargs, match):
    """Unknown zones and calendars, and intervals not dividing an hour, are ValueErrors."""
    args = {"interval_s": 300, **kwargs}
    with pytest.raises(ValueError, match=match):
        calendar.local_time_grid(np.array([0]), **args)
    with pytest.raises(ValueError, match=match):
        bl.fit_baseline(np.array([0]), np.array([1]), as_of_s=86_400, **args)


# ---------------------------------------------------------------------------------------------
# Poisson fits
# ---------------------------------------------------------------------------------------------


def test_poisson_irls_matches_statsmodels_glm_with_offset():
    """Coefficients and covariance equal statsmodels' Poisson GLM with offset log(exposure)."""
    rng = np.random.default_rng(3)
    n = 500
    hours = rng.uniform(0, 24, n)
    X = np.column_stack([np.ones(n), np.sin(2 * np.pi * hours / 24), np.cos(2 * np.pi * hours / 24),
                         rng.normal(size=n)])
    exposure = rng.integers(1, 4, n).astype(float)
    y = rng.poisson(exposure * np.exp(X @ np.array([1.5, 0.8, -0.4, 0.2])))
    coef, cov = smoothing.poisson_irls(X, y, exposure)
    # reference: statsmodels GLM, Poisson family (log link), offset = log(exposure)
    ref = sm.GLM(y, X, family=sm.families.Poisson(), offset=np.log(exposure)).fit(tol=1e-13)
    np.testing.assert_allclose(coef, ref.params, rtol=1e-6)
    np.testing.assert_allclose(cov, ref.cov_params(), rtol=1e-5)


@pytest.mark.parametrize("n_bins", [24, 25, 288])
def test_folded_band_storage_holds_the_dense_cyclic_hessian(n_bins):
    """The banded (folded-order) Hessian equals diag(w) + lambda D' diag(v) D built densely."""
    rng = np.random.default_rng(n_bins)
    w, v = rng.uniform(0, 50, n_bins), rng.uniform(0.05, 1.0, n_bins)
    d = np.zeros((n_bins, n_bins))
    for i in range(n_bins):
        d[i, [(i - 1) % n_bins, i, (i + 1) % n_bins]] += [1.0, -2.0, 1.0]
    dense = np.diag(w) + 3.0 * d.T @ np.diag(v) @ d
    pen = smoothing._cyclic_penalty(n_bins)
    bands = smoothing._hessian_bands(w, v, 3.0, pen)
    rebuilt = np.zeros((n_bins, n_bins))
    for k in range(5):
        j = np.arange(n_bins - k)
        rebuilt[pen.perm[j + k], pen.perm[j]] = bands[k, : n_bins - k]
        rebuilt[pen.perm[j], pen.perm[j + k]] = bands[k, : n_bins - k]
    np.testing.assert_allclose(rebuilt, dense, rtol=0, atol=1e-12)


def test_profile_from_bin_totals_equals_interval_level_penalised_glm():
    """The fit from bin totals equals a penalised GLM on every single interval (same lambda)."""
    rng = np.random.default_rng(5)
    n_bins, n_days = 24, 30
    truth = 5 + 40 * _bump(np.arange(n_bins) + 0.5, 8.0, 2.0)
    observed = rng.random((n_days, n_bins)) > 0.1  # 10 % of intervals missing
    counts = rng.poisson(truth[None, :] * np.ones((n_days, 1)))
    day_idx, bin_idx = np.nonzero(observed)
    y = counts[day_idx, bin_idx]
    totals = np.bincount(bin_idx, weights=y, minlength=n_bins)
    exposures = np.bincount(bin_idx, minlength=n_bins).astype(float)
    log_penalty = 2.0
    log_rate, log_var, _ = smoothing.penalised_log_rate_fit(totals, exposures, smoothness_df=None,
                                                     log_penalty=log_penalty)
    # reference: dense IRLS on one row per interval, one-hot design, penalty exp(2) D'D
    design = np.eye(n_bins)[bin_idx]
    coef, cov = smoothing.poisson_irls(design, y, np.ones(y.size),
                                penalty=math.exp(log_penalty) * _cyclic_penalty_dense(n_bins))
    np.testing.assert_allclose(log_rate, coef, rtol=0, atol=1e-9)
    np.testing.assert_allclose(log_var, np.diag(cov), rtol=1e-8)


def test_student_t_profile_is_a_mode_of_its_penalised_likelihood():
    """No direction improves the fitted heavy-tailed objective (checked with scipy's L-BFGS-B)."""
    rng = np.random.default_rng(8)
    truth = _rhythm(300)[0]
    exposures = np.full(288, 30.0)
    totals = rng.poisson(truth * exposures).astype(float)
    log_penalty = 8.0
    log_rate, _, _ = smoothing.penalised_log_rate_fit(totals, exposures, smoothness_df=4.0,
                                               log_penalty=log_penalty)
    lam, nu = math.exp(log_penalty), 4.0

    def negative_objective(beta):
        d = np.roll(beta, 1) - 2 * beta + np.roll(beta, -1)
        value = np.sum(totals * beta - exposures * np.exp(beta)) - (nu + 1) / 2 * np.sum(
            np.log1p(lam * d * d / nu))
        return -value

    start = negative_objective(log_rate)
    # reference: scipy.optimize (L-BFGS-B) started at our answer must find nothing better
    res = optimize.minimize(negative_objective, log_rate, method="L-BFGS-B",
                            options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 2000})
    assert res.fun >= start - 1e-7 * abs(start)
    np.testing.assert_allclose(res.x, log_rate, atol=1e-4)


def test_sharp_quarter_hour_peak_is_not_blurred_into_its_neighbors():
    """On expected totals the t-prior profile keeps a 3-bin 1.8x peak; a quadratic one spills it."""
    truth = _rhythm(300)[0]
    exposures = np.full(288, 35.0)
    totals = truth * exposures  # the data's expectation: what remains is the method's own bias
    for interval_alpha in (0.0, 0.02):
        fitted = np.exp(smoothing.penalised_log_rate_fit(totals, exposures,
                                                  interval_alpha=interval_alpha)[0])
        busy = truth >= 20
        assert np.abs(fitted[busy] / truth[busy] - 1).max() < 0.02  # dry run: 0.5 % and 1.2 %
        quadratic = np.exp(smoothing.penalised_log_rate_fit(totals, exposures, smoothness_df=None,
                                                     interval_alpha=interval_alpha)[0])
        # the same LAML choice with a single quadratic penalty lifts the neighbors (bins 179 and
        # 183) by 6.5-11 % and cuts the peak's edges (dry run)
        assert min(quadratic[179] / truth[179], quadratic[183] / truth[183]) > 1.05


def test_quiet_bins_with_zero_totals_get_small_positive_rates():
    """Night bins whose totals are 0 get small rates > 0; the noisy peak still keeps its height."""
    rng = np.random.default_rng(21)
    truth = _rhythm(300)[0].copy()
    truth[:48] = 0.02  # 00:00-04:00 almost empty: most bin totals are 0
    exposures = np.full(288, 35.0)
    totals = rng.poisson(truth * exposures).astype(float)
    assert np.sum(totals[:48] == 0) > 20
    fitted = np.exp(smoothing.penalised_log_rate_fit(totals, exposures)[0])
    assert np.all(fitted > 0) and np.all(np.isfinite(fitted))
    assert np.all(fitted[8:40] < 0.2)  # away from the steps at 04:00 and midnight
    # mean of the 3 peak bins: Poisson SE about 1/sqrt(3 * 35 * 90) = 1 %, so 5 % is 5 SE
    assert fitted[180:183].mean() / truth[180:183].mean() == pytest.approx(1.0, abs=0.05)


# ---------------------------------------------------------------------------------------------
# Dispersion
# ---------------------------------------------------------------------------------------------


def test_negative_binomial_ml_matches_statsmodels():
    """Level and alpha equal statsmodels' NegativeBinomial (NB2) with a constant and offset."""
    rng = np.random.default_rng(13)
    mean = rng.uniform(300, 3000, 400)  # daily totals of differently complete days
    y = rng.poisson(mean * rng.gamma(1 / 0.03, 0.03, mean.size))
    level, alpha = dispersion.negative_binomial_ml(y, mean, tol=1e-10)
    # reference: statsmodels.discrete NegativeBinomial, loglike_method="nb2", offset = log(mean)
    model = NegativeBinomial(y, np.ones(y.size), offset=np.log(mean), loglike_method="nb2")
    rough = model.fit(method="bfgs", maxiter=1000, disp=0)  # its default Newton start diverges
    ref = model.fit(start_params=rough.params, method="newton", maxiter=200, tol=1e-12, disp=0)
    np.testing.assert_allclose(math.log(level), ref.params[0], rtol=0, atol=1e-7)
    np.testing.assert_allclose(alpha, ref.params[1], rtol=1e-6)


def test_dean_score_statistic_matches_statsmodels():
    """Our Poisson dispersion score statistic equals statsmodels' Dean B statistic."""
    rng = np.random.default_rng(17)
    x = rng.normal(size=300)
    y = rng.negative_binomial(5, 5 / (5 + np.exp(1 + 0.5 * x)))
    X = sm.add_constant(x)
    res = Poisson(y, X).fit(disp=0)
    # reference: statsmodels count diagnostics, test_dispersion(), method "Dean B"
    ref = res.get_diagnostic().test_dispersion()
    dean_b = float(ref.statistic[list(ref.method).index("Dean B")])
    ours = dispersion.dispersion_test(y, res.predict())
    assert ours.statistic == pytest.approx(dean_b, rel=1e-10)


def test_bortkiewicz_horse_kicks_are_poisson():
    """Horse-kick deaths (0..4 seen 109, 65, 22, 3, 1; Bortkiewicz 1898, frequencies from memory) test as Poisson."""
    deaths = np.repeat([0, 1, 2, 3, 4], [109, 65, 22, 3, 1])
    assert deaths.mean() == pytest.approx(0.61)
    assert deaths.var(ddof=1) == pytest.approx(0.611, abs=1e-3)  # Bortkiewicz 1898 data: variance ~ 0.611
    mean = np.full(deaths.size, deaths.mean())
    leverage = np.full(deaths.size, 1 / deaths.size)  # the mean was estimated from the counts
    score = dispersion.dispersion_test(deaths, mean, leverage=leverage)
    pearson = dispersion.dispersion_test(deaths, mean, leverage=leverage, method="pearson")
    assert score.p_value > 0.3 and pearson.p_value > 0.3
    # Pearson X^2 = sum (y - 0.61)^2 / 0.61 = 121.58 / 0.61 = 199.3 on 199 df (hand computation)
    assert pearson.statistic == pytest.approx(121.58 / 0.61, rel=1e-9)
    assert dispersion.negative_binomial_ml(deaths, mean)[1] == 0.0  # variance below the mean: boundary
    # X^2 = 199.3 on 199 df: the Pearson moment estimate of alpha is only just above 0
    assert dispersion.pearson_alpha(deaths, mean, dof=deaths.size - 1) < 0.005


def _weekday_only_history(rng, *, days, interval_s, day_alpha, interval_alpha):
    """UTC detector history (no DST), a smooth rhythm, every day Monday-Sunday."""
    n = 86_400 // interval_s
    hours = (np.arange(n) + 0.5) * interval_s / 3600
    rhythm = 20 + 200 * _bump(hours, 8.0, 1.5) + 240 * _bump(hours, 17.0, 2.0)
    t = np.arange(0, days * 86_400, interval_s) + 4 * 86_400  # starts on Monday 1970-01-05
    g = rng.gamma(1 / day_alpha, day_alpha, days) if day_alpha else np.ones(days)
    h = rng.gamma(1 / interval_alpha, interval_alpha, t.size) if interval_alpha else 1.0
    lam = np.tile(rhythm, days) * np.repeat(g, n) * h
    return t, rng.poisson(lam), int(t[-1] + interval_s)


def test_dispersion_estimators_recover_known_day_and_interval_alpha():
    """day_alpha 0.02 and interval_alpha 0.05 are recovered from three years of 15-min counts."""
    rng = np.random.default_rng(29)
    t, counts, end = _weekday_only_history(rng, days=3 * 364, interval_s=900, day_alpha=0.02,
                                           interval_alpha=0.05)
    fit = bl.fit_baseline(t, counts, interval_s=900, timezone="UTC", as_of_s=end,
                          window_days=3 * 364)
    assert fit.status == "fitted"
    weekday = fit.baseline.profiles["weekday"]
    assert weekday.distribution == "negative_binomial"
    # 780 weekdays: SE of the day-level ML about 0.02 * sqrt(2/780) = 5 %; 25 % is 5 SE
    assert weekday.day_alpha == pytest.approx(0.02, rel=0.25)
    for name in calendar.DAY_TYPES:  # 15 000+ intervals per type: SE about 2 %; 10 % is 5 SE
        assert fit.baseline.profiles[name].interval_alpha == pytest.approx(0.05, rel=0.10), name


def test_genuinely_poisson_counts_are_called_poisson():
    """Eight weeks of pure Poisson counts are labeled "poisson" for every day type, with the
    day level at its floor (never 0: a level frozen at the profile's alerts on every busy
    day) and next to no interval-level excess."""
    rng = np.random.default_rng(31)
    sim = _simulate(rng, start_local="2026-10-05T00:00", end_local="2026-11-30T00:00",
                    rhythm=_rhythm(300))
    fit = bl.fit_baseline(sim["t"], sim["counts"], interval_s=300, timezone=CHICAGO,
                          holiday_calendar="US", as_of_s=_epoch("2026-11-30T00:00"))
    # each profile's combined test has size 0.001: chance of a false "negative_binomial" ~0.3 %
    for name in calendar.DAY_TYPES:
        prof = fit.baseline.profiles[name]
        assert prof.distribution == "poisson", (name, prof.smoothing)
        assert prof.day_alpha == pytest.approx(bl.LEVEL_VAR_FLOOR)
        assert prof.interval_alpha < 0.005  # 15 000+ intervals: SE of the Pearson alpha ~0.001
        assert prof.dispersion_p_value >= bl.OVERDISPERSION_LEVEL


# ---------------------------------------------------------------------------------------------
# Intervals
# ---------------------------------------------------------------------------------------------


def test_garwood_interval_matches_chi_square_formula_and_published_values():
    """Exact Poisson CI: x=10 -> (4.795, 18.390), x=0 -> (0, 3.689) (Garwood 1936, Biometrika 28:437-442)."""
    low, high = intervals.garwood_interval(np.array([0, 10]))
    assert low[0] == 0.0 and high[0] == pytest.approx(3.689, abs=5e-4)
    assert low[1] == pytest.approx(4.795, abs=5e-4) and high[1] == pytest.approx(18.390, abs=5e-4)
    # reference: the defining tail equations, solved with mpmath (regularised incomplete gamma)
    for x in (1, 3, 10, 57):
        lo_ref = mpmath.findroot(lambda m, x=x: mpmath.gammainc(x, 0, m, regularized=True) - 0.025,
                                 x)
        hi_ref = mpmath.findroot(
            lambda m, x=x: mpmath.gammainc(x + 1, m, mpmath.inf, regularized=True) - 0.025, x + 3)
        lo, hi = intervals.garwood_interval(np.array([x]))
        assert lo[0] == pytest.approx(float(lo_ref), rel=1e-9)
        assert hi[0] == pytest.approx(float(hi_ref), rel=1e-9)


def _mid_p_bounds_brute_force(pmf: np.ndarray, tail: float) -> tuple[int, int]:
    cdf = np.cumsum(pmf)
    mid = cdf - 0.5 * pmf  # P(Y < y) + P(Y = y)/2
    low = int(np.argmax(mid >= tail))
    high = int(np.nonzero(mid <= 1 - tail)[0].max())
    return low, high


def test_predictive_interval_is_the_mid_p_interval_of_the_gamma_mixed_count():
    """Bounds equal mid-p quantiles of Poisson / NB(combined alpha) computed by brute force."""
    ks = np.arange(0, 2000)
    cases = [(0.5, 0.0, 0.0, 0.0), (10.0, 0.0, 0.0, 0.0), (100.0, 0.0, 0.0, 0.0),
             (40.0, 0.05, 0.01, 0.02), (250.0, 0.02, 0.004, 0.01), (3.0, 0.1, 0.0, 0.3)]
    for mu, se, a_day, a_int in cases:
        low, high = intervals.predictive_interval(np.array([mu]), se, a_day, a_int)
        alpha = math.exp(se**2) * (1 + a_day) * (1 + a_int) - 1
        if alpha == 0:
            pmf = stats.poisson.pmf(ks, mu)  # reference pmfs: scipy.stats
        else:
            pmf = stats.nbinom.pmf(ks, 1 / alpha, 1 / (1 + alpha * mu))
        assert (int(low[0]), int(high[0])) == _mid_p_bounds_brute_force(pmf, 0.025), mu
    # Poisson mean 10: P(Y<5) = 0.029, P(Y>16) = 0.027 -> [5, 16] (hand computation)
    assert [int(v[0]) for v in intervals.predictive_interval(np.array([10.0]), 0, 0, 0)] == [5, 16]


# ---------------------------------------------------------------------------------------------
# fit_baseline end to end
# ---------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def busy_detector():
    """A busy approach (about 22 000 vehicles on a weekday), 24 weeks of history plus 8 held out.

    Gamma day factors (alpha 0.004) and interval factors (alpha 0.005), 5 % of intervals missing,
    the DST change of 2026-11-01 and the holidays of the "US" calendar inside the window, and three
    faulty days: stuck at zero all day (Tue 2026-11-10), chattering x3 (Wed 2026-11-18) and stuck
    at zero from 10:00 (Sat 2026-11-14).
    """
    rng = np.random.default_rng(2026)
    rhythm = _rhythm(300, scale=2.2)
    sim = _simulate(rng, start_local="2026-06-29T00:00", end_local="2027-02-08T00:00",
                    rhythm=rhythm, day_alpha=0.004, interval_alpha=0.005, missing=0.05)
    counts = sim["counts"].copy()

    def on(day):
        return sim["days"] == date.fromisoformat(day).toordinal()

    counts[on("2026-11-10")] = 0
    counts[on("2026-11-18")] *= 3
    counts[on("2026-11-14") & (sim["bins"] >= 120)] = 0
    faulty = on("2026-11-10") | on("2026-11-18") | on("2026-11-14")
    as_of = _epoch("2026-12-14T00:00")
    train = sim["observed"] & (sim["t"] < as_of)
    fit = bl.fit_baseline(sim["t"][train], counts[train], interval_s=300, timezone=CHICAGO,
                          holiday_calendar="US", as_of_s=as_of, window_days=168)
    return {**sim, "counts": counts, "rhythm": rhythm, "faulty": faulty, "as_of": as_of,
            "train": train, "fit": fit}


def test_end_to_end_expected_volumes_are_within_5_percent_of_truth(busy_detector):
    """Fitted expected volumes are within 5 % of the truth wherever it is >= 20 per interval."""
    d = busy_detector
    assert d["fit"].status == "fitted"
    base = d["fit"].baseline
    for code, name in enumerate(calendar.DAY_TYPES):
        prof = base.profiles[name]
        assert prof.fitted_from == name
        clean = d["train"] & ~d["faulty"] & (d["types"] == code)
        # The day factors of the days seen average to a realised level (sd sqrt(0.004/24) = 1.3 %
        # for 24 Saturdays), which no estimator can see past; the shape check uses it, the
        # uncertainty check below uses the raw truth.
        level = np.mean(np.unique(d["g"][clean]))
        truth = d["rhythm"][code]
        busy = truth >= 20
        error = np.abs(prof.expected[busy] / (truth[busy] * level) - 1)
        # 60 dry-run seeds: largest error 3.5 % (over 120-170 bins per day type)
        assert error.max() < 0.05, (name, error.max(), int(busy.sum()))
        # log_se covers level and shape: dry runs gave sd(z) = 1.00 over all bins and a largest
        # |z| of 4.1 in 180 profiles of ~150 correlated bins
        z = np.abs(np.log(prof.expected[busy] / truth[busy])) / prof.log_se[busy]
        assert z.max() < 5.0, name


def test_end_to_end_predictive_intervals_cover_95_percent_of_held_out_counts(busy_detector):
    """95 % intervals cover 93-97 % of eight weeks of held-out normal counts."""
    d = busy_detector
    base = d["fit"].baseline
    held_out = d["observed"] & (d["t"] >= d["as_of"])
    mu, log_se, day_alpha, interval_alpha = base.expected_for(d["types"][held_out],
                                                              d["bins"][held_out])
    low, high = intervals.predictive_interval(mu, log_se, day_alpha, interval_alpha, level=0.95)
    y = d["counts"][held_out]
    coverage = np.mean((y >= low) & (y <= high))
    # 60 dry-run seeds: 0.940-0.959, mean 0.950, sd 0.004: 93-97 % is 5 sd either side
    assert 0.93 <= coverage <= 0.97, coverage


def test_end_to_end_robust_fit_is_not_dragged_by_faulty_days(busy_detector):
    """Faulty days are trimmed; the fit equals one with them excluded by hand to within 1 %."""
    d = busy_detector
    base = d["fit"].baseline
    assert base.days_trimmed >= 3
    faulty_observed = int(np.sum(d["faulty"] & d["train"]))
    assert base.intervals_trimmed >= faulty_observed
    assert base.intervals_trimmed < faulty_observed + 200  # and hardly anything else
    train = d["train"]
    clean = bl.fit_baseline(d["t"][train], d["counts"][train], interval_s=300, timezone=CHICAGO,
                            holiday_calendar="US", as_of_s=d["as_of"], window_days=168,
                            exclude=d["faulty"][train]).baseline
    for code, name in enumerate(calendar.DAY_TYPES):
        busy = d["rhythm"][code] >= 20
        ratio = base.profiles[name].expected[busy] / clean.profiles[name].expected[busy]
        assert np.abs(ratio - 1).max() < 0.01, name  # dry runs: at most 0.2 %
    # (a plain average would have been dragged: the chatter day alone is +1.7 % on weekdays,
    # the Saturday stuck from 10:00 is -4 % on Saturday afternoons)
    assert base.profiles["weekday"].distribution == "negative_binomial"


def test_missing_intervals_are_not_treated_as_zero_traffic():
    """With 12:00-14:00 missing on half the days, those bins are still estimated at full volume."""
    rng = np.random.default_rng(41)
    rhythm = _rhythm(300, scale=2.0)
    sim = _simulate(rng, start_local="2026-10-05T00:00", end_local="2026-11-30T00:00",
                    rhythm=rhythm, missing=0.05)
    gap = (sim["bins"] >= 144) & (sim["bins"] < 168) & (sim["days"] % 2 == 0)
    keep = sim["observed"] & ~gap
    as_of = _epoch("2026-11-30T00:00")
    fit = bl.fit_baseline(sim["t"][keep], sim["counts"][keep], interval_s=300, timezone=CHICAGO,
                          holiday_calendar="US", as_of_s=as_of)
    base = fit.baseline
    assert base.days_dropped == 0  # 2 h of 24 missing still leaves 87 % of each day
    # 56 x 86 400 s before as_of is 01:00 on the first day (the fall-back hour)
    in_window = keep & (sim["t"] >= as_of - 56 * 86_400)
    assert base.intervals_used + base.intervals_trimmed == int(in_window.sum())
    weekday = base.profiles["weekday"].expected
    # ~19 weekdays observed in those bins, truth ~100: SE ~2.3 % per bin; 10 % is 4 SE.
    # Gaps counted as zeros would have halved them.
    np.testing.assert_allclose(weekday[144:168], rhythm[0][144:168], rtol=0.10)


def test_half_life_weights_follow_a_recent_change_in_level():
    """With a 7-day half-life the weekday level follows a step from 1.0 to 1.5 four weeks ago."""
    rng = np.random.default_rng(43)
    sim = _simulate(rng, start_local="2026-10-05T00:00", end_local="2026-11-30T00:00",
                    rhythm=_rhythm(300))
    counts = sim["counts"].copy()
    late = sim["t"] >= _epoch("2026-11-02T00:00")
    counts[late] = rng.poisson(1.5 * sim["lam"][late])
    kwargs = {"interval_s": 300, "timezone": CHICAGO, "holiday_calendar": "US",
              "as_of_s": _epoch("2026-11-30T00:00")}
    truth = _rhythm(300)[0].sum()
    flat = bl.fit_baseline(sim["t"], counts, **kwargs).baseline.profiles["weekday"].expected
    recent = bl.fit_baseline(sim["t"], counts, half_life_days=7, **kwargs).baseline
    # the last 4 weeks carry 1/(1 + 2^-4) = 94 % of the weight -> level about 1.47; equal weights
    # give about 1.25 (Poisson noise on ~10 000 vehicles a day is far below these margins)
    assert 1.40 < recent.profiles["weekday"].expected.sum() / truth < 1.52
    assert 1.15 < flat.sum() / truth < 1.35


def test_day_type_with_too_little_history_falls_back_to_pooled_profile():
    """Two Saturdays and two Sundays (< 3) take the pooled shape at their own level."""
    rng = np.random.default_rng(47)
    sim = _simulate(rng, start_local="2026-10-05T00:00", end_local="2026-10-19T00:00",
                    rhythm=_rhythm(300), calendar=None)
    fit = bl.fit_baseline(sim["t"], sim["counts"], interval_s=300, timezone=CHICAGO,
                          as_of_s=_epoch("2026-10-19T00:00"), window_days=14)
    assert fit.status == "fitted"
    base = fit.baseline
    assert base.profiles["weekday"].fitted_from == "weekday"
    for code, name in ((1, "saturday"), (2, "sunday_holiday")):
        prof = base.profiles[name]
        assert prof.fitted_from == "pooled" and prof.days_used == 2
        assert prof.smoothing["pooled_days"] == 14
        mine = sim["types"] == code
        observed_daily = sim["counts"][mine].sum() / 2
        # level from its own two days: expected daily volume matches their mean total
        assert prof.expected.sum() == pytest.approx(observed_daily, rel=0.01)
    # a type never seen keeps the pooled level with a wide level uncertainty
    only_weekdays = sim["types"] == 0
    fit = bl.fit_baseline(sim["t"][only_weekdays], sim["counts"][only_weekdays], interval_s=300,
                          timezone=CHICAGO, as_of_s=_epoch("2026-10-19T00:00"), window_days=14)
    saturday = fit.baseline.profiles["saturday"]
    assert saturday.fitted_from == "pooled" and saturday.days_used == 0
    assert np.all(saturday.log_se >= math.sqrt(bl.NO_LEVEL_LOG_VAR))
    assert fit.baseline.days_dropped == 4  # the weekend days in the window had no data


def test_too_little_history_is_insufficient():
    """Two usable days, or days that are mostly missing, give insufficient_history."""
    rng = np.random.default_rng(53)
    sim = _simulate(rng, start_local="2026-10-05T00:00", end_local="2026-10-15T00:00",
                    rhythm=_rhythm(300), calendar=None)
    as_of = _epoch("2026-10-15T00:00")
    recent = sim["t"] >= _epoch("2026-10-13T00:00")
    fit = bl.fit_baseline(sim["t"][recent], sim["counts"][recent], interval_s=300,
                          timezone=CHICAGO, as_of_s=as_of)
    assert fit.status == "insufficient_history" and fit.baseline is None
    assert "2 usable days" in fit.reason
    sparse = rng.random(sim["t"].size) < 0.5  # every day only half complete
    fit = bl.fit_baseline(sim["t"][sparse], sim["counts"][sparse], interval_s=300,
                          timezone=CHICAGO, as_of_s=as_of)
    assert fit.status == "insufficient_history"
    fit = bl.fit_baseline(np.zeros(0, dtype=np.int64), np.zeros(0), interval_s=300,
                          timezone=CHICAGO, as_of_s=as_of)
    assert fit.status == "insufficient_history"


def test_dead_detector_has_no_baseline():
    """Zeros on every day of the window fail with a reason instead of fitting zero rates."""
    t = np.arange(_epoch("2026-10-05T00:00"), _epoch("2026-10-19T00:00"), 300)
    fit = bl.fit_baseline(t, np.zeros(t.size, dtype=int), interval_s=300, timezone=CHICAGO,
                          as_of_s=_epoch("2026-10-19T00:00"))
    assert fit.status == "failed" and "no vehicles" in fit.reason


def test_fit_baseline_rejects_malformed_input():
    """Mismatched lengths, negative or fractional counts and a bad exclude mask are ValueErrors."""
    t = np.arange(0, 3000, 300)
    kwargs = {"interval_s": 300, "timezone": CHICAGO, "as_of_s": 3000}
    with pytest.raises(ValueError, match="differ in length"):
        bl.fit_baseline(t, np.ones(t.size - 1), **kwargs)
    with pytest.raises(ValueError, match="non-negative whole numbers"):
        bl.fit_baseline(t, -np.ones(t.size), **kwargs)
    with pytest.raises(ValueError, match="non-negative whole numbers"):
        bl.fit_baseline(t, np.full(t.size, 1.5), **kwargs)
    with pytest.raises(ValueError, match="exclude"):
        bl.fit_baseline(t, np.ones(t.size), exclude=np.ones(3, bool), **kwargs)


# ---------------------------------------------------------------------------------------------
# Results
# ---------------------------------------------------------------------------------------------


def test_baseline_round_trips_through_json(busy_detector):
    """to_dict -> JSON text -> from_dict rebuilds an identical baseline."""
    base = busy_detector["fit"].baseline
    text = json.dumps(base.to_dict(), allow_nan=False)
    again = bl.Baseline.from_dict(json.loads(text))
    assert again.to_dict() == base.to_dict()
    codes = np.array([0, 1, 2, 0])
    bins = np.array([0, 100, 287, 181])
    for ours, theirs in zip(base.expected_for(codes, bins), again.expected_for(codes, bins),
                            strict=True):
        np.testing.assert_array_equal(ours, theirs)
    assert again.timezone == CHICAGO and again.holiday_calendar == "US"


def _flat_baseline(expected_by_type: list[np.ndarray], interval_s: int) -> bl.Baseline:
    profiles = {
        name: bl.DayTypeProfile(day_type=name, fitted_from=name, expected=e,
                                log_se=np.full(e.size, 0.01), day_alpha=0.0, interval_alpha=0.0,
                                distribution="poisson", dispersion_p_value=0.5, days_used=8,
                                smoothing={})
        for name, e in zip(calendar.DAY_TYPES, expected_by_type, strict=True)
    }
    return bl.Baseline(interval_s=interval_s, bins_per_day=86_400 // interval_s, profiles=profiles,
                       window_start_s=0, window_end_s=86_400, intervals_used=0,
                       intervals_trimmed=0, days_dropped=0)


def test_daily_profile_summary_gives_planners_figures():
    """Daily and hourly volumes, the busiest expected hour and its share of the expected day
    (named for what it is: not K30, and no peak-hour factor from a smoothed curve), per lane;
    volumes to 3 significant figures, shares to 3 decimals."""
    weekday = np.full(288, 10.0)
    weekday[0] = 10.123  # rounds away: 3,300.123 vehicles a day is given as 3,300
    weekday[204:216] = [40, 40, 40, 60, 60, 60, 40, 40, 40, 40, 40, 40]  # 17:00-18:00
    saturday = np.full(288, 5.0)
    sunday = np.full(288, 2.0)
    summary = bl.daily_profile_summary(_flat_baseline([weekday, saturday, sunday], 300), lanes=2)
    wk = summary["weekday"]
    # hand computation: 276 * 10 + 540 = 3300 per day; peak hour 17:00-18:00 = 540 vehicles
    assert wk["daily_volume"] == pytest.approx(3300.0)
    assert wk["daily_volume_per_lane"] == pytest.approx(1650.0)
    assert len(wk["hourly_volume"]) == 24 and wk["hourly_volume"][17] == pytest.approx(540.0)
    assert wk["busiest_hour"]["start"] == "17:00" and wk["busiest_hour"]["volume"] == 540
    assert wk["busiest_hour"]["share_of_expected_day"] == round(540 / 3300, 3) == 0.164
    assert "peak_hour_factor" not in wk["busiest_hour"] and "peak_hour" not in wk
    assert summary["saturday"]["daily_volume"] == pytest.approx(1440.0)
    assert summary["sunday_holiday"]["hourly_volume"] == pytest.approx([24.0] * 24)
    with pytest.raises(ValueError):
        bl.daily_profile_summary(_flat_baseline([weekday, saturday, sunday], 300), lanes=0)


def test_expected_for_looks_up_codes_and_bins_vectorised():
    """expected_for broadcasts day-type codes and bins and returns each profile's alphas."""
    expected = [np.arange(1.0, 25.0), np.arange(1.0, 25.0) * 2, np.arange(1.0, 25.0) * 3]
    base = _flat_baseline(expected, 3600)
    codes, bins = np.array([0, 1, 2]), np.array([0, 5, 23])
    mu, log_se, day_alpha, interval_alpha = base.expected_for(codes, bins)
    np.testing.assert_array_equal(mu, [1.0, 12.0, 72.0])
    np.testing.assert_array_equal(log_se, [0.01, 0.01, 0.01])
    assert day_alpha.shape == (3,) and interval_alpha.shape == (3,)


def test_local_time_grid_handles_a_month_of_one_minute_starts_across_dst():
    """A month of 1-minute starts across the fall-back change: one count per local minute."""
    t = np.arange(_epoch("2026-10-15T00:00"), _epoch("2026-11-15T00:00"), 60)
    grid = calendar.local_time_grid(t, interval_s=60, timezone=CHICAGO, holiday_calendar="US")
    per_day = np.bincount(grid.local_day - grid.local_day.min())
    assert per_day.tolist().count(1500) == 1  # 2026-11-01 has 25 hours
    assert set(per_day.tolist()) == {1440, 1500}
    start = datetime(2026, 10, 15)
    assert grid.local_day.min() == (start.date() - date(1970, 1, 1)).days
    assert grid.local_day.max() == (start.date() + timedelta(days=30) - date(1970, 1, 1)).days


def test_expected_for_names_its_fields_and_still_unpacks():
    """``expected_for`` gives mu, log_se and both alphas by name, broadcast, and unpacks in order."""
    base = _flat_baseline([np.full(288, 2.0), np.full(288, 3.0), np.full(288, 4.0)], 300)
    codes = np.array([[0], [1], [2]])
    bins = np.array([0, 100, 287])
    got = base.expected_for(codes, bins)
    assert isinstance(got, bl.Expected)
    mu, log_se, day_alpha, interval_alpha = got
    assert mu is got.mu and log_se is got.log_se
    assert day_alpha is got.day_alpha and interval_alpha is got.interval_alpha
    np.testing.assert_array_equal(got.mu, np.array([[2.0] * 3, [3.0] * 3, [4.0] * 3]))
    assert got.log_se.shape == got.day_alpha.shape == got.interval_alpha.shape == (3, 3)
    np.testing.assert_array_equal(got.log_se, 0.01)
