"""Evidence that a detector's counts depart from its baseline.

Pure numpy/scipy: no web or database imports. Counts are vehicles per interval; times are epoch
seconds (UTC) and ``interval_s`` seconds; probabilities are natural logarithms (``log_p``) unless a
name says ``surprise`` (``-log10 p``).

The predictive model
--------------------
The baseline gives, for every interval, ``mu`` (expected vehicles), ``log_se`` (standard error of
``log mu``), ``day_alpha`` (variance of a gamma day factor with mean 1) and ``interval_alpha``
(negative binomial alpha of the interval-level excess). A count is Poisson given its rate
``mu * D * B * H``: ``D`` today's level, ``B`` the baseline's own error (lognormal, variance
``exp(log_se**2) - 1``), ``H`` the interval factor. Because ``D`` makes a busy day busy all
morning, intervals are not independent. The scorer therefore learns ``D`` online: a Poisson-gamma
conjugate posterior from the detector's recent intervals of the same local day (the last hour,
stretched back up to 6 h while it holds under 60 vehicles' worth of information), prior
Gamma(shape ``1/day_alpha``, rate ``1/day_alpha``), each interval weighted by
``1 / (1 + (interval_alpha + exp(log_se**2) - 1) mu)`` (its information about ``D`` relative to a
Poisson count; quasi-likelihood weighting), leaving out every interval already flagged and, once
a flag is raised, the 30 minutes before it (the onset of a shift, scored before its alarm, is
not learned as today's level). The local day bounds the window because ``D`` is a day factor;
``score_timeline`` takes the local day of each interval for that. Each interval is then judged against the posterior predictive negative binomial: mean
``mu * a/b`` and alpha ``(1 + 1/a) exp(log_se**2) (1 + interval_alpha) - 1`` (the relative
variances of independent mean-one factors multiply; the product is moment-matched to one gamma).
By the prequential (sequential predictive) factorisation the product of these predictives is the
joint probability of the sequence, so sequential tests on them need no independence assumption.

Tests and their families
------------------------
``no_counts``
    a run of zero counts; probability of the whole run, ``exp(-sum lambda)`` for Poisson and the
    moment-matched gamma mixture ``(1 + Var/M)^(-M^2/Var)`` otherwise, judged against the level
    posterior as it stood when the run began.
``low_volume`` / ``high_volume``
    single-interval tail probabilities (lower tail for counts of at least one; zeros belong to
    ``no_counts``) and a one-sided CUSUM of the log-likelihood ratio for a rate ratio ``rho``
    (Lucas 1985; Poisson increment ``y ln rho - m (rho - 1)``, negative binomial increment
    ``y ln rho - (y + 1/alpha) ln((1 + alpha rho m)/(1 + alpha m))``). An alarm is held while the
    shift lasts (statistic capped at 1.25 h, released below h/2, then restarted from zero), so
    every interval of a lasting fault is flagged and kept out of the level. The decision limit h
    comes from the in-control alarm rate over the week's bins, each bin's average run length
    computed by the Markov chain of Brook & Evans (1972) (``cusum_alarm_rate`` explains why
    bins are not averaged into one matrix). The reported ``log_p`` is the smaller of the tail
    ``log_p`` and ``-S``
    (by Ville's inequality a likelihood ratio started at a fixed time exceeds ``e^S`` with
    probability at most ``e^-S``).
``repeated_value``
    the same nonzero count ``k`` times in a row; ``log_p`` is the predictive probability that the
    next ``k - 1`` present intervals repeat the first one's value exactly.
``over_capacity``
    a count above the physical cap (``capacity_cap``), whatever the baseline says.
``no_data``
    a run of ``k`` missing intervals has probability ``q^k`` under the detector's missing rate ``q``;
    a lone missing interval is ragged data, never an alert.

Exactness and continuity
------------------------
Tail probabilities are exact in log space far below the double-precision range (see
``log_p_lower``). Running sums (level posterior, CUSUM, runs) are kept in 2**-24 fixed point in
int64, so they are exact integers whatever the order of addition: scoring a timeline in one call
or in consecutive chunks (passing ``warm_state``) gives bit-identical results.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import special

from service.domain import INTERVAL_RULE_TEXT, interval_ok

__all__ = [
    "KINDS",
    "Evidence",
    "Thresholds",
    "WarmState",
    "capacity_cap",
    "cusum_alarm_rate",
    "cusum_arl",
    "cusum_increment",
    "cusum_limit",
    "log_p_lower",
    "log_p_upper",
    "log_pmf",
    "log_p_zero_run",
    "score_timeline",
    "surprise",
]

KINDS = ("no_counts", "low_volume", "high_volume", "over_capacity", "repeated_value", "no_data")

SECONDS_PER_WEEK = 7 * 24 * 3600
_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)
# scipy's regularized incomplete gamma/beta are used where their value is comfortably inside the
# normal double range; below this the tail is summed term by term in log space.
_DIRECT_FLOOR = 1e-250
_LARGE_MEAN = 1e5

_FIX = float(1 << 24)  # fixed-point scale of the running sums (resolution 6e-8)
_FIX_CLIP = 1e7  # no single term beyond this magnitude (keeps int64 sums far from overflow)
# A CUSUM in alarm is held, capped at CUSUM_CEILING * h, until it falls below CUSUM_RELEASE * h:
# an alarm outlasts the shift that raised it by 0.75 h of in-control drift (one or two intervals
# on a busy detector, about an hour on one seeing 2 vehicles per 5 min).
CUSUM_CEILING = 1.25
CUSUM_RELEASE = 0.5


def _fix(x: np.ndarray) -> np.ndarray:
    return np.rint(np.clip(x, -_FIX_CLIP, _FIX_CLIP) * _FIX).astype(np.int64)


# ---------------------------------------------------------------------------------------------
# Distributions in log space
# ---------------------------------------------------------------------------------------------


def _stirlerr(n: np.ndarray) -> np.ndarray:
    """log(n!) - [(n + 1/2) log n - n + log sqrt(2 pi)], the Stirling error (Loader 2000)."""
    n = np.asarray(n, dtype=float)
    out = np.empty_like(n)
    big = n > 15.0
    nb = n[big]
    nn = nb * nb
    s0, s1, s2, s3, s4 = 1 / 12, 1 / 360, 1 / 1260, 1 / 1680, 1 / 1188
    out[big] = (s0 - (s1 - (s2 - (s3 - s4 / nn) / nn) / nn) / nn) / nb
    ns = n[~big]
    with np.errstate(divide="ignore", invalid="ignore"):
        out[~big] = special.gammaln(ns + 1.0) - (ns + 0.5) * np.log(ns) + ns - _LOG_SQRT_2PI
    return out


def _bd0(x: np.ndarray, m: np.ndarray) -> np.ndarray:
    """x log(x/m) + m - x without cancellation when x is close to m (Loader 2000)."""
    x, m = np.broadcast_arrays(np.asarray(x, dtype=float), np.asarray(m, dtype=float))
    out = np.empty(x.shape)
    near = np.abs(x - m) < 0.1 * (x + m)
    xf, mf = x[~near], m[~near]
    with np.errstate(divide="ignore", invalid="ignore"):
        out[~near] = special.xlogy(xf, xf / mf) + mf - xf
    xn, mn = x[near], m[near]
    v = (xn - mn) / (xn + mn)
    s = (xn - mn) * v
    ej = 2.0 * xn * v
    v2 = v * v
    # |v| < 0.1 so each term is at least 100 times smaller than the last: 10 terms reach 1e-20.
    for j in range(1, 11):
        ej = ej * v2
        s = s + ej / (2 * j + 1)
    out[near] = s
    return out


def _as_arrays(count: Any, mu: Any, alpha: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    y, m, a = np.broadcast_arrays(
        np.asarray(count, dtype=float), np.asarray(mu, dtype=float), np.asarray(alpha, dtype=float)
    )
    return y.astype(float, copy=True), m.astype(float, copy=True), a.astype(float, copy=True)


def _log_pmf(y: np.ndarray, m: np.ndarray, a: np.ndarray) -> np.ndarray:
    """Log pmf on flat float arrays; a == 0 is Poisson."""
    out = np.empty(y.shape)
    pois = a <= 0.0
    zero = y == 0.0
    if not pois.any() and not zero.any() and np.all(y >= 1e-10 / a):
        return _nb_log_pmf_positive(y, m, a)
    # Poisson: -stirlerr(y) - bd0(y, m) - log sqrt(2 pi y)   (Loader's saddle-point form)
    i = pois & ~zero
    out[pois & zero] = -m[pois & zero]
    if i.any():
        yi = y[i]
        out[i] = -_stirlerr(yi) - _bd0(yi, m[i]) - _LOG_SQRT_2PI - 0.5 * np.log(yi)
    # Negative binomial, size r = 1/alpha, in R's dnbinom_mu form (binomial saddle point).
    j = ~pois & zero
    out[j] = -np.log1p(a[j] * m[j]) / a[j]
    j = ~pois & ~zero
    if j.any():
        yj, mj, aj = y[j], m[j], a[j]
        res = np.empty(yj.shape)
        tiny = yj < 1e-10 / aj  # size so large the count hardly sees it: near-Poisson expansion
        if tiny.any():
            yt, mt, rt = yj[tiny], mj[tiny], 1.0 / aj[tiny]
            res[tiny] = (
                yt * np.log(mt / (1.0 + mt / rt))
                - rt * np.log1p(mt / rt)
                - special.gammaln(yt + 1.0)
                + np.log1p(yt * (yt - 1.0) / (2.0 * rt))
            )
        k = ~tiny
        if k.any():
            res[k] = _nb_log_pmf_positive(yj[k], mj[k], aj[k])
        out[j] = res
    return out


def _nb_log_pmf_positive(y, m, a):
    """NB log pmf for y > 0 in R's dnbinom_mu form (binomial saddle point, Loader 2000)."""
    r = 1.0 / a
    n = r + y
    p = r / (r + m)
    q = m / (r + m)
    lc = _stirlerr(n) - _stirlerr(r) - _stirlerr(y) - _bd0(r, n * p) - _bd0(y, n * q)
    lf = 2.0 * _LOG_SQRT_2PI + np.log(r) + np.log(y / n)
    return np.log(r / n) + lc - 0.5 * lf


def log_pmf(count: Any, mu: Any, alpha: Any = 0.0) -> np.ndarray:
    """Log probability of exactly ``count`` vehicles.

    Parameters
    ----------
    count : array_like
        Observed vehicles per interval (non-negative integers).
    mu : array_like
        Expected vehicles per interval (> 0).
    alpha : array_like, default 0
        Negative binomial alpha (variance ``mu + alpha mu^2``); 0 is Poisson.

    Returns
    -------
    numpy.ndarray
        Natural log of the probability, accurate to a few ulps of its magnitude for means up to
        1e9 (Loader's saddle-point form, no ``gammaln`` cancellation).
    """
    y, m, a = _as_arrays(count, mu, alpha)
    return _log_pmf(y.ravel(), m.ravel(), a.ravel()).reshape(y.shape)


def _tail_series(y, m, a, log_pmf_y, *, upper: bool) -> np.ndarray:
    """log of the tail as log pmf(y) + log sum of pmf ratios, for far tails (vectorised).

    Upper: sum_{j>=0} pmf(y+j)/pmf(y), ratios m/(k+1) (Poisson) or q (k+r)/(k+1) (NB).
    Lower: sum_{j=0}^{y} pmf(y-j)/pmf(y), ratios k/m or k/((k-1+r) q).
    Terms are summed until the geometric bound on the remainder is below 1e-17 of the sum.
    """
    n = y.size
    total = np.ones(n)
    term = np.ones(n)
    k = y.copy()
    pois = a <= 0.0
    r = 1.0 / np.where(pois, 1.0, a)  # placeholder 1 for Poisson rows (masked below)
    q = a * m / (1.0 + a * m)
    active = np.arange(n)
    for _ in range(10_000_000):
        if active.size == 0:
            break
        ka, ma, ra, qa, pa = k[active], m[active], r[active], q[active], pois[active]
        if upper:
            ratio = np.where(pa, ma / (ka + 1.0), qa * (ka + ra) / (ka + 1.0))
            # ratios fall with k except for NB with r < 1, where they rise towards q
            bound = np.where(pa | (ra >= 1.0), ratio, np.maximum(ratio, qa))
            k[active] = ka + 1.0
        else:
            with np.errstate(divide="ignore", invalid="ignore"):
                ratio = np.where(pa, ka / ma, ka / ((ka - 1.0 + ra) * qa))
            ratio = np.where(ka <= 0.0, 0.0, ratio)
            bound = np.where(pa | (ra >= 1.0), ratio, np.inf)
            k[active] = ka - 1.0
        t = term[active] * ratio
        term[active] = t
        total[active] += t
        with np.errstate(divide="ignore", invalid="ignore"):
            rest = np.where(bound < 1.0, t * bound / (1.0 - bound), np.inf)
        done = (t == 0.0) | (rest <= 1e-17 * total[active])
        if not upper:
            done |= k[active] < 0.0
        active = active[~done]
    return log_pmf_y + np.log(total)


def _log_tails(y: np.ndarray, m: np.ndarray, a: np.ndarray, lpmf: np.ndarray | None = None):
    """Both tails (log P(Y <= y), log P(Y >= y)) on flat arrays, one incomplete-function call."""
    if lpmf is None:
        lpmf = _log_pmf(y, m, a)
    pois = a <= 0.0
    r = 1.0 / np.where(pois, 1.0, a)
    # NB failure probability q = alpha m / (1 + alpha m), formed directly: 1 - p would lose digits
    # when alpha m is tiny. P(Y <= y) = 1 - I_q(y + 1, r) and P(Y >= y) = I_q(y, r).
    q = a * m / (1.0 + a * m)
    # The smaller tail is computed directly; the other as 1 - smaller + pmf (>= 1/2, no loss).
    mode_side = y < m  # lower tail is the smaller one (to within the pmf at y)
    small = np.empty(y.shape)
    lo, hi = mode_side, ~mode_side
    i = lo & pois
    small[i] = special.gammaincc(y[i] + 1.0, m[i])
    # I_p(r, y + 1) with p = 1/(1 + alpha m) is five times faster than the complement form in
    # scipy, but 1 - p inside it loses digits when q is small; the complement is used there.
    i = lo & ~pois & (q >= 0.01)
    small[i] = special.betainc(r[i], y[i] + 1.0, 1.0 / (1.0 + a[i] * m[i]))
    i = lo & ~pois & (q < 0.01)
    small[i] = special.betaincc(y[i] + 1.0, r[i], q[i])
    i = hi & pois & (y > 0)
    small[i] = special.gammainc(y[i], m[i])
    i = hi & ~pois & (y > 0)
    small[i] = special.betainc(y[i], r[i], q[i])
    small[hi & (y <= 0)] = 1.0
    log_small = np.empty(y.shape)
    # scipy's incomplete gamma/beta lose digits in the tails of very large means (4.6e-6
    # relative at a = 1.005e6, x = 1e6, measured against mpmath); sum those tails instead.
    ok = (small > _DIRECT_FLOOR) & ~((m > _LARGE_MEAN) & (small < 1e-3))
    log_small[ok] = np.log(small[ok])
    far = np.flatnonzero(~ok)
    if far.size:
        f_lo = far[mode_side[far]]
        f_hi = far[~mode_side[far]]
        if f_lo.size:
            log_small[f_lo] = _tail_series(y[f_lo], m[f_lo], a[f_lo], lpmf[f_lo], upper=False)
        if f_hi.size:
            log_small[f_hi] = _tail_series(y[f_hi], m[f_hi], a[f_hi], lpmf[f_hi], upper=True)
    pmf = np.exp(lpmf)
    other = np.log(np.clip(1.0 - np.exp(log_small) + pmf, 0.0, 1.0))
    log_lower = np.where(mode_side, log_small, other)
    log_upper = np.where(mode_side, other, log_small)
    return np.minimum(log_lower, 0.0), np.minimum(log_upper, 0.0)


def log_p_lower(count: Any, mu: Any, alpha: Any = 0.0) -> np.ndarray:
    """Natural log of the lower tail P(Y <= count) under Poisson(mu) or NB(mu, alpha).

    Exact in log space far beyond double precision: where scipy's regularized incomplete gamma
    or beta would be below 1e-250 (it underflows near 1e-308), the tail is summed as
    ``log pmf(count) + log sum_j pmf(count - j)/pmf(count)`` with the log pmf in Loader's
    saddle-point form, stopping when a geometric bound on the rest is below 1e-17 of the sum.

    Parameters
    ----------
    count : array_like
        Observed vehicles per interval.
    mu : array_like
        Expected vehicles per interval (> 0).
    alpha : array_like, default 0
        Negative binomial alpha (variance ``mu + alpha mu^2``); 0 is Poisson.

    Returns
    -------
    numpy.ndarray
        ``log P(Y <= count)`` (<= 0), broadcast over the inputs.
    """
    y, m, a = _as_arrays(count, mu, alpha)
    lo, _ = _log_tails(y.ravel(), m.ravel(), a.ravel())
    return lo.reshape(y.shape)


def log_p_upper(count: Any, mu: Any, alpha: Any = 0.0) -> np.ndarray:
    """Natural log of the upper tail P(Y >= count) under Poisson(mu) or NB(mu, alpha).

    Same method and parameters as ``log_p_lower``; ``count <= 0`` gives 0.
    """
    y, m, a = _as_arrays(count, mu, alpha)
    _, hi = _log_tails(y.ravel(), m.ravel(), a.ravel())
    return hi.reshape(y.shape)


def surprise(log_p: Any) -> np.ndarray:
    """Surprise score ``-log10 p`` from a natural-log p-value (0 = unremarkable)."""
    return -np.asarray(log_p, dtype=float) / math.log(10.0)


def _log1p_ratio(u: np.ndarray) -> np.ndarray:
    """log(1 + u) / u, continuous at u = 0."""
    u = np.asarray(u, dtype=float)
    small = np.abs(u) < 1e-8
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.log1p(u) / np.where(small, 1.0, u)
    return np.where(small, 1.0 - 0.5 * u, out)


def _zero_run_log_p(total_mu, total_excess, total_base_sd, level, level_var):
    """log P(all zero) for a run, from its sums (moment-matched gamma mixture).

    The run's total rate is Lambda = sum_i mu_i D B_i H_i with D the level (mean ``level``,
    relative variance ``level_var``), B_i the baseline error (fully correlated within the run,
    sd ``sigma_i``) and H_i independent interval factors (variance ``interval_alpha_i``):
    ``total_mu = sum mu_i``, ``total_excess = sum interval_alpha_i mu_i^2 (1 + sigma_i^2)`` and
    ``total_base_sd = sum mu_i sigma_i``. Lambda is matched to a gamma with its mean M and
    variance V, whose Laplace transform at 1 is ``(1 + V/M)^(-M^2/V)``; V = 0 gives ``-M``.
    Exact for Poisson and for a shared gamma factor alone; with both a shared level and
    independent excess it overstates the run's probability (conservative), by 1-2.5 % of
    log p for dispersions up to 0.05 (checked against numerical integration in the tests).
    """
    mean = level * total_mu
    var = level * level * (
        (1.0 + level_var) * (total_excess + total_base_sd**2) + level_var * total_mu**2
    )
    with np.errstate(divide="ignore", invalid="ignore"):
        x = np.where(mean > 0, var / np.where(mean > 0, mean, 1.0), 0.0)
    return -mean * _log1p_ratio(x)


def log_p_zero_run(mu: Any, *, interval_alpha: Any = 0.0, shared_alpha: float = 0.0,
                   log_se: Any = 0.0) -> float:
    """Log probability that every interval of a run counts zero vehicles.

    Parameters
    ----------
    mu : array_like
        Expected vehicles per interval over the run.
    interval_alpha : array_like, default 0
        Independent interval-level excess (negative binomial alpha) per interval.
    shared_alpha : float, default 0
        Relative variance of a gamma level factor shared by the whole run (the day factor, or
        ``1/a`` of the online level posterior).
    log_se : array_like, default 0
        Standard error of ``log mu`` per interval, taken as fully correlated within the run.

    Returns
    -------
    float
        ``-sum mu`` for Poisson; ``-(1/alpha) log(1 + alpha sum mu)`` for a shared gamma factor
        alone (exact); otherwise the moment-matched gamma mixture of ``_zero_run_log_p``.
    """
    mu, ia, se = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (mu, interval_alpha,
                                                                              log_se)))
    sig2 = np.expm1(se * se)
    out = _zero_run_log_p(mu.sum(), (ia * mu * mu * (1.0 + sig2)).sum(),
                          (mu * np.sqrt(sig2)).sum(), 1.0, float(shared_alpha))
    return float(out)


# ---------------------------------------------------------------------------------------------
# CUSUM: increments, Markov-chain average run length, decision limit
# ---------------------------------------------------------------------------------------------


def _increment_terms(mean, alpha, rho):
    """z = slope * y + offset for the log-likelihood ratio of rate rho*mean against mean."""
    mean = np.asarray(mean, dtype=float)
    alpha = np.asarray(alpha, dtype=float)
    u = alpha * mean * (rho - 1.0) / (1.0 + alpha * mean)
    lratio = np.log1p(u)  # log((1 + alpha rho m) / (1 + alpha m)); 0 for Poisson
    slope = math.log(rho) - lratio
    offset = -mean * (rho - 1.0) / (1.0 + alpha * mean) * _log1p_ratio(u)
    return slope, offset


def cusum_increment(count: Any, mean: Any, *, rho: float, alpha: Any = 0.0) -> np.ndarray:
    """Log-likelihood-ratio CUSUM increment for a rate change ``mean -> rho * mean``.

    Poisson (``alpha = 0``): ``y ln rho - mean (rho - 1)`` (Lucas 1985 with a time-varying
    expectation). Negative binomial with the same alpha under both rates:
    ``y ln rho - (y + 1/alpha) ln((1 + alpha rho mean) / (1 + alpha mean))``.

    Parameters
    ----------
    count : array_like
        Observed vehicles per interval.
    mean : array_like
        In-control expected vehicles per interval.
    rho : float
        Rate ratio the CUSUM is tuned to (< 1 for the lower side, > 1 for the upper side).
    alpha : array_like, default 0
        Negative binomial alpha of the in-control predictive.
    """
    slope, offset = _increment_terms(mean, alpha, rho)
    return slope * np.asarray(count, dtype=float) + offset


@dataclass(frozen=True)
class _StepLaws:
    """Increment laws z = slope*y + offset, y ~ NB/Poisson, for representative means."""

    slope: np.ndarray  # (K,)
    offset: np.ndarray  # (K,)
    cdf: np.ndarray  # (K, Y) P(y <= j), padded with 1
    weight: np.ndarray  # (K,) number of bins each representative stands for


def _group_bins(mu, *extra, ratio: float = 1.1):
    """Group bins geometrically in mu (``ratio`` wide): group mu, group means of ``extra``,
    and bin counts."""
    mu = np.atleast_1d(np.asarray(mu, dtype=float)).ravel()
    if np.any(~np.isfinite(mu)) or np.any(mu <= 0):
        raise ValueError("mu must be positive and finite")
    gid = np.floor(np.log(mu / mu.min()) / math.log(ratio)).astype(int)
    _, gid = np.unique(gid, return_inverse=True)
    cnt = np.bincount(gid).astype(float)
    gmu = np.exp(np.bincount(gid, weights=np.log(mu)) / cnt)
    means = [np.bincount(gid, weights=np.broadcast_to(np.asarray(x, dtype=float), mu.shape)
                         .ravel()) / cnt for x in extra]
    return gmu, means, cnt


def _step_laws(mu, alpha, rho, *, true_mu=None, true_alpha=None) -> _StepLaws:
    """One increment law per given mean: increments computed for the predictive (mu, alpha),
    counts drawn from (true_mu, true_alpha) (default the predictive itself)."""
    gmu = np.atleast_1d(np.asarray(mu, dtype=float))
    gal = np.broadcast_to(np.asarray(alpha, dtype=float), gmu.shape)
    tmu = gmu if true_mu is None else np.broadcast_to(np.asarray(true_mu, float), gmu.shape)
    tal = gal if true_alpha is None else np.broadcast_to(np.asarray(true_alpha, float),
                                                         gmu.shape)
    sd = np.sqrt(tmu + tal * tmu * tmu)
    ymax = int(np.max(tmu + 12.0 * sd + 20.0))
    ys = np.arange(ymax + 1, dtype=float)
    lp = log_pmf(ys[None, :], tmu[:, None], tal[:, None])
    cdf = np.minimum(np.cumsum(np.exp(lp), axis=1), 1.0)
    cdf[:, -1] = 1.0
    slope, offset = _increment_terms(gmu, gal, rho)
    return _StepLaws(np.asarray(slope, float), np.asarray(offset, float), cdf,
                     np.ones(gmu.size))


def _arls(h: float, laws: _StepLaws, states: int) -> np.ndarray:
    """Markov-chain ARL from S = 0, one per increment law (Brook & Evans 1972).

    Grid points ``i w`` (``w = h/states``, i = 0..states-1); a step from a grid point lands
    between two grid points and its probability is split between them in proportion to
    closeness (linear interpolation), which keeps the mean increment exact. Plain rounding to
    the nearest cell biases the drift when increments sit on a lattice (``y ln rho`` plus a
    constant) and, at small means, did not converge even with 1,500 cells. The split version
    converges from below: against 1,500 points it was 0-5 % short with 150-200 points (up to
    12 % at 0.05 vehicles per interval, where alarms are negligible), so limits derived with
    it err towards fewer false alerts.
    """
    t = states
    w = h / t
    k, ny = laws.cdf.shape
    pmf = np.diff(laws.cdf, axis=1, prepend=0.0)
    x = (laws.slope[:, None] * np.arange(ny)[None, :] + laws.offset[:, None]) / w
    fl = np.floor(x)
    frac = x - fl
    lo = np.clip(fl, -t, t).astype(int) + t
    hi = np.clip(fl + 1.0, -t, t).astype(int) + t
    rows = np.repeat(np.arange(k) * (2 * t + 1), ny)
    g = np.bincount(rows + lo.ravel(), weights=(pmf * (1.0 - frac)).ravel(),
                    minlength=k * (2 * t + 1))
    g += np.bincount(rows + hi.ravel(), weights=(pmf * frac).ravel(), minlength=k * (2 * t + 1))
    g = g.reshape(k, 2 * t + 1)  # g[:, t + d]: probability of moving d grid steps
    below = np.cumsum(g, axis=1)
    d = np.arange(t)[None, :] - np.arange(t)[:, None]
    r = g[:, d + t]
    r[:, :, 0] = below[:, t - np.arange(t)]  # at or below zero: back to S = 0
    # A whisker of extra absorption keeps I - R invertible when the mean is so small that the
    # chain almost never moves (ARL is then capped near 1e13 intervals, far beyond any budget).
    r *= 1.0 - 1e-13
    arl = np.linalg.solve(np.eye(t)[None, :, :] - r, np.ones((k, t, 1)))
    return arl[:, 0, 0]


def cusum_arl(h: float, *, rho: float, mu: Any, alpha: Any = 0.0, states: int = 400) -> np.ndarray:
    """In-control average run length of the LLR CUSUM started at 0, by Markov chain.

    The CUSUM ``S_t = max(0, S_{t-1} + z_t)`` with ``z`` from ``cusum_increment`` alarms at
    ``S_t >= h``. Brook & Evans (1972): S is carried on ``states`` grid points of [0, h), the
    transition matrix R among them gives ``ARL = [(I - R)^-1 1]_0`` (see ``_arls`` for the
    discretisation).

    Parameters
    ----------
    h : float
        Decision limit (natural-log likelihood-ratio units).
    rho : float
        Rate ratio of the CUSUM.
    mu : array_like
        Constant in-control expected vehicles per interval (one chain per value).
    alpha : array_like, default 0
        Negative binomial alpha of the in-control predictive.
    states : int, default 400
        Number of Markov-chain grid points.

    Returns
    -------
    numpy.ndarray
        Expected number of intervals to the first alarm, one per ``mu``.
    """
    mu, alpha = np.broadcast_arrays(np.asarray(mu, dtype=float), np.asarray(alpha, dtype=float))
    out = _arls(float(h), _step_laws(mu.ravel(), alpha.ravel(), rho), states)
    return out.reshape(mu.shape)


class _RateCurve:
    """Alarm rate over a week's bins, quasi-static, with log ARL interpolated over log mu."""

    NODES = 12

    def __init__(self, mu, alpha, rho, states):
        gmu, (gal,), cnt = _group_bins(mu, alpha)
        self.weight = cnt / cnt.sum()
        self.log_gmu = np.log(gmu)
        if gmu.size <= self.NODES:
            nodes, nal = gmu, gal
        else:
            nodes = np.exp(np.linspace(self.log_gmu[0], self.log_gmu[-1], self.NODES))
            nal = np.interp(np.log(nodes), self.log_gmu, gal)
        self.log_nodes = np.log(nodes)
        self.laws = _step_laws(nodes, nal, rho)
        self.states = states

    def rate(self, h: float) -> float:
        log_rate = -np.log(_arls(h, self.laws, self.states))
        if self.log_nodes.size > 1:
            log_rate = np.interp(self.log_gmu, self.log_nodes, log_rate)
        return float(self.weight @ np.exp(log_rate))


def cusum_alarm_rate(h: float, *, rho: float, mu: Any, alpha: Any = 0.0,
                     states: int = 150) -> float:
    """Expected in-control alarms per interval over bins with a time-varying expectation.

    Quasi-static (local ARL) approximation: each interval contributes ``1 / ARL(mu_t)``, the
    alarm rate of a CUSUM that has run at that interval's expectation for a while. With reset to
    zero after each alarm, alarms form a renewal process and ``1/ARL`` is its stationary rate.
    Bins are grouped 10 % wide in ``mu`` and ``log ARL`` is interpolated over ``log mu`` between
    12 nodes. On weekly 5-min profiles this matched simulation of the real periodic sequence to
    a few percent, whereas averaging the transition matrix over the week's bins (treating each
    interval's expectation as an independent draw) under-counted alarms by a factor of about
    two on a busy Poisson detector: the peak hours, where almost all alarms happen, are not
    diluted by quiet steps in reality.

    Parameters
    ----------
    h, rho, states
        As for ``cusum_arl``.
    mu : array_like
        In-control expected vehicles per interval of each bin (e.g. the week's bins).
    alpha : array_like, default 0
        Predictive negative binomial alpha of each bin.

    Returns
    -------
    float
        Expected alarms per interval; multiply by intervals per week for alarms per week.
    """
    return _RateCurve(mu, alpha, rho, states).rate(float(h))


def cusum_limit(arl0: float, *, rho: float, mu: Any, alpha: Any = 0.0, states: int = 150) -> float:
    """Decision limit ``h`` whose in-control alarm rate (``cusum_alarm_rate``) is ``1/arl0``.

    Solved by Brent's method on ``log rate(h)``.
    ``h`` lies below ``log(arl0)``: for i.i.d. observations Lorden (1971) gives
    ``ARL0 >= e^h`` for a CUSUM of exact log-likelihood ratios.
    """
    from scipy.optimize import brentq

    curve = _RateCurve(mu, alpha, rho, states)
    target = -math.log(arl0)

    def gap(h: float) -> float:
        return math.log(curve.rate(h)) - target

    lo = 1e-3
    if gap(lo) <= 0:
        return lo
    hi = max(1.0, -target)
    while gap(hi) > 0:
        lo, hi = hi, 1.5 * hi
    # The rate is a step function of h for lattice increments (busy Poisson detectors), so the
    # root is located to 1e-3 in h rather than to an exact rate.
    return float(brentq(gap, lo, hi, xtol=1e-3))


# ---------------------------------------------------------------------------------------------
# Physical plausibility
# ---------------------------------------------------------------------------------------------

# Highway Capacity Manual base capacities (from memory): basic freeway segment 2,400 pc/h/ln
# (HCM 2000 table, free-flow speed >= 70 mph; HCM 6th ed. c = 2,200 + 10 (FFS - 50) capped at
# 2,400); base saturation flow at a signalized approach 1,900 pc/h/ln. Local roads take the
# signalized figure (their flow is governed by intersections).
BASE_CAPACITY_PER_LANE_H = {"freeway": 2400.0, "arterial": 1900.0, "local": 1900.0}
# Headroom above the base capacity before a count is called physically implausible: heavy
# vehicles count as more than one passenger car and short intervals see brief surges above a
# 15-minute rate. 1.5 is common practice for a fault cap, not a published figure.
CAPACITY_MARGIN = 1.5


def capacity_cap(road_class: str, *, lanes: int, interval_s: int,
                 per_lane_hourly: float | None = None, margin: float = CAPACITY_MARGIN) -> int:
    """Largest physically plausible count per interval; a count above it is a detector fault.

    Parameters
    ----------
    road_class : {"freeway", "arterial", "local"}
        Road class; arterial means a signalized approach.
    lanes : int
        Lanes the detector counts.
    interval_s : int
        Interval length in seconds.
    per_lane_hourly : float, optional
        Override of the base capacity in vehicles per hour per lane (a detector's own figure).
    margin : float, default 1.5
        Headroom factor over the base capacity (common practice).

    Returns
    -------
    int
        ``ceil(per_lane_hourly * margin * lanes * interval_s / 3600)`` vehicles per interval.
    """
    if per_lane_hourly is None:
        try:
            per_lane_hourly = BASE_CAPACITY_PER_LANE_H[road_class]
        except KeyError:
            raise ValueError(f"unknown road class {road_class!r}; expected one of "
                             f"{sorted(BASE_CAPACITY_PER_LANE_H)}") from None
    if lanes < 1 or interval_s <= 0 or per_lane_hourly <= 0 or margin <= 0:
        raise ValueError("lanes, interval_s, per_lane_hourly and margin must be positive")
    return int(math.ceil(per_lane_hourly * margin * lanes * interval_s / 3600.0 - 1e-9))


# ---------------------------------------------------------------------------------------------
# False-alert budget -> thresholds
# ---------------------------------------------------------------------------------------------

# Bonferroni-style split of the weekly budget across the statistical test families; inside the
# low and high volume families half goes to the single-interval tail test and half to the CUSUM.
DEFAULT_SHARES = {
    "no_counts": 0.2,
    "low_volume": 0.2,
    "high_volume": 0.2,
    "repeated_value": 0.2,
    "no_data": 0.2,
}
# The rate a detector's missing rate is floored at: with perfect completeness a lone gap would
# otherwise be "impossible". Runs shorter than MIN_MISSING_RUN are never an alert.
MIN_MISSING_RATE = 1e-3
MIN_MISSING_RUN = 2


def _window_intervals(level_memory_s: float, interval_s: int) -> int:
    return max(1, int(round(level_memory_s / interval_s)))


def _level_windows(info_cum: np.ndarray, ends: np.ndarray, *, shortest: int, longest: int,
                   information: int) -> np.ndarray:
    """Window length per interval: the shortest stretch back (between ``shortest`` and
    ``longest`` intervals) holding at least ``information`` of the cumulative ``info_cum``
    (non-decreasing) before position ``ends``."""
    j = np.searchsorted(info_cum, info_cum[ends] - information, side="right") - 1
    return np.clip(ends - j, shortest, longest)


def _typical_predictive(mu, interval_alpha, day_alpha, log_se, thresholds_like):
    """Predictive alpha of each bin of a week, with the level posterior a typical week gives.

    The posterior shape is ``1/day_alpha`` plus the weighted expected count of the level window
    before each bin (cyclically), i.e. the level factor at its mean.
    """
    shortest, longest, information = thresholds_like
    mu, ia, da, se = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (
        mu, interval_alpha, day_alpha, log_se)))
    sig2 = np.expm1(se * se)
    n = mu.size
    qm = _fix(mu / (1.0 + (ia + sig2) * mu))
    reps = 1 + -(-longest // n)
    c = np.concatenate([[0], np.cumsum(np.tile(qm, reps + 1))])
    ends = np.arange(n) + reps * n
    k = _level_windows(c, ends, shortest=shortest, longest=longest, information=information)
    seen = (c[ends] - c[ends - k]) / _FIX
    with np.errstate(divide="ignore"):
        shape = np.where(da > 0, 1.0 / np.where(da > 0, da, 1.0) + seen, np.inf)
    level_var = np.where(np.isfinite(shape), 1.0 / shape, 0.0)
    alpha = np.expm1(np.log1p(level_var) + se * se + np.log1p(ia))
    return mu, alpha, level_var, ia, sig2


def _critical_low(mu, alpha, log_a):
    """Largest y with log P(Y <= y) < log_a (-1 if none), per bin."""
    from scipy import stats

    a_ = np.exp(log_a)
    guess = np.where(alpha > 0,
                     stats.nbinom.ppf(a_, 1.0 / np.maximum(alpha, 1e-300), 1.0 / (1.0 + alpha * mu)),
                     stats.poisson.ppf(a_, mu)) - 1.0
    c = np.maximum(np.nan_to_num(guess, nan=-1.0), -1.0)
    for _ in range(50):  # step down while c itself is not below the threshold
        bad = (c >= 0) & (log_p_lower(np.maximum(c, 0), mu, alpha) >= log_a)
        if not bad.any():
            break
        c = np.where(bad, c - 1.0, c)
    for _ in range(50):  # step up while c + 1 still is
        good = log_p_lower(c + 1.0, mu, alpha) < log_a
        if not good.any():
            break
        c = np.where(good, c + 1.0, c)
    return c


def _critical_high(mu, alpha, log_a):
    """Smallest y with log P(Y >= y) < log_a, per bin."""
    from scipy import stats

    a_ = np.exp(log_a)
    guess = np.where(alpha > 0,
                     stats.nbinom.isf(a_, 1.0 / np.maximum(alpha, 1e-300), 1.0 / (1.0 + alpha * mu)),
                     stats.poisson.isf(a_, mu)) + 1.0
    c = np.maximum(np.nan_to_num(guess, nan=1.0, posinf=1e9), 1.0)
    for _ in range(50):
        bad = log_p_upper(c, mu, alpha) >= log_a
        if not bad.any():
            break
        c = np.where(bad, c + 1.0, c)
    for _ in range(50):
        good = (c > 1) & (log_p_upper(c - 1.0, mu, alpha) < log_a)
        if not good.any():
            break
        c = np.where(good, c - 1.0, c)
    return c


def _expected_zero_runs(mu, alpha, level_var, ia, sig2, log_a):
    """Expected zero-run alerts per week: sum over run starts of P(run reaches the threshold)."""
    n = mu.size
    ex = ia * mu * mu * (1.0 + sig2)
    sd = mu * np.sqrt(sig2)
    c1, c2, c3 = (np.concatenate([[0.0], np.cumsum(np.concatenate([v, v]))]) for v in (mu, ex, sd))
    s = np.arange(n)

    def log_p(length):
        e = s + length
        return _zero_run_log_p(c1[e] - c1[s], c2[e] - c2[s], c3[e] - c3[s], 1.0, level_var)

    reach = log_p(np.full(n, n)) < log_a
    lo = np.ones(n, dtype=int)
    hi = np.full(n, n)
    while np.any(lo < hi):  # smallest length whose probability is below the threshold
        mid = (lo + hi) // 2
        below = log_p(mid) < log_a
        hi = np.where(below, mid, hi)
        lo = np.where(below, lo, np.minimum(mid + 1, hi))
    p_start = -np.expm1(log_pmf(0.0, np.roll(mu, 1), np.roll(alpha, 1)))
    return float(np.sum(np.where(reach, np.exp(log_p(lo)) * p_start, 0.0)))


def _expected_repeats(mu, alpha, log_a, min_repeat):
    """Expected repeated-value alerts per week, taking each bin's expectation over the run."""
    total = 0.0
    for chunk in np.array_split(np.arange(mu.size), max(1, mu.size // 512)):
        m, a = mu[chunk], alpha[chunk]
        vmax = int(np.max(m + 12.0 * np.sqrt(m + a * m * m) + 10.0))
        v = np.arange(1, vmax + 1, dtype=float)[None, :]
        lp = log_pmf(v, m[:, None], a[:, None])
        with np.errstate(divide="ignore"):
            k = np.maximum(min_repeat, 1 + np.ceil(log_a / np.minimum(lp, -1e-300)))
        # P(y_{s-1} != v) P(y_s = v) P(next k-1 repeat v)
        total += float(np.sum((1.0 - np.exp(lp)) * np.exp(lp * k)))
    return total


@dataclass(frozen=True)
class Thresholds:
    """Decision thresholds for every test, derived from one false-alert budget.

    Attributes
    ----------
    false_alerts_per_week : float
        Budget F: expected false alerts (episodes) per detector per week under normal traffic.
    interval_s : int
        Interval length in seconds the thresholds were derived for.
    log_alpha_low, log_alpha_high : float
        Per-interval natural-log significance of the single-interval lower / upper tail tests.
    log_alpha_zero_run : float
        Natural-log threshold on the probability of a run of zero counts.
    log_alpha_repeat : float
        Natural-log threshold on the probability of a run of repeated values.
    min_repeat : int
        Fewest identical counts in a row that can be flagged.
    missing_run : int
        Missing intervals in a row that make a ``no_data`` alert.
    log_missing_rate : float
        Natural log of the detector's missing rate used for ``no_data`` evidence.
    rho_low, rho_high : float
        Rate ratios the lower and upper CUSUMs are tuned to.
    h_low, h_high : float
        CUSUM decision limits (natural-log likelihood ratio).
    level_memory_s, level_memory_max_s : float
        Shortest and longest history, in seconds, of the online level posterior.
    level_information : float
        Vehicles' worth of (weighted) expectation the level window is stretched to hold.
    level_guard_s : float
        When a flag is raised, the intervals this long before it leave the level posterior.
    expected_per_week : Mapping[str, float]
        Expected false alerts per week of each test at these thresholds under the model
        (``repeated_value`` and the CUSUMs approximate; see ``from_budget``).
    """

    false_alerts_per_week: float
    interval_s: int
    log_alpha_low: float
    log_alpha_high: float
    log_alpha_zero_run: float
    log_alpha_repeat: float
    min_repeat: int
    missing_run: int
    log_missing_rate: float
    rho_low: float
    rho_high: float
    h_low: float
    h_high: float
    level_memory_s: float
    level_memory_max_s: float
    level_information: float
    level_guard_s: float
    expected_per_week: Mapping[str, float] = field(default_factory=dict, compare=False)

    @classmethod
    def from_budget(
        cls,
        false_alerts_per_week: float = 0.05,
        *,
        interval_s: int,
        mu_week: Any = None,
        interval_alpha: Any = 0.0,
        day_alpha: Any = 0.0,
        log_se: Any = 0.0,
        missing_rate: float = 0.01,
        rho_low: float = 0.5,
        rho_high: float = 2.0,
        level_memory_s: float = 3600.0,
        level_memory_max_s: float = 6 * 3600.0,
        level_information: float = 60.0,
        level_guard_s: float = 1800.0,
        min_repeat: int = 3,
        shares: Mapping[str, float] | None = None,
    ) -> Thresholds:
        """Derive every test's threshold from the weekly false-alert budget F.

        Let n be the intervals per week. Each family gets ``F * share`` (default a fifth each for
        no_counts, low_volume, high_volume, repeated_value, no_data; over_capacity needs none,
        its cap sits far above normal traffic). Per-interval significance is the family share
        over n (Bonferroni); low_volume and high_volume give half to the single-interval test
        and half to the CUSUM. ``no_data`` needs the shortest run L >= 2 of missing intervals
        with ``n (1 - q) q^L`` at most its share, q the missing rate.

        With ``mu_week`` (the detector's expected vehicles for each interval of a week, and the
        same-length or scalar baseline dispersion) the discrete tests' expected false alerts
        are computed under the model: exactly for the single-interval tests and for no_data;
        for zero runs by summing over run starts; for repeats taking each bin's expectation
        over the run. Discrete tests spend less than their share (a count cannot be 0.3 of a
        vehicle); the unspent part goes to the two CUSUMs, whose limit is continuous, so the
        expected total matches F. Each CUSUM's limit h makes its quasi-static in-control alarm
        rate (``cusum_alarm_rate``, Brook & Evans chains over the week's bins) equal to its
        budget. Without ``mu_week`` no slack is moved and ``h = log(ARL0)``, which Lorden's
        (1971) bound ``ARL0 >= e^h`` makes conservative.

        Parameters
        ----------
        false_alerts_per_week : float, default 0.05
            Budget F, expected false alerts per detector per week.
        interval_s : int
            Interval length in seconds.
        mu_week : array_like, optional
            Expected vehicles per interval for the bins of one week (or any representative
            sample of bins).
        interval_alpha, day_alpha, log_se : array_like, default 0
            The baseline's dispersion for those bins.
        missing_rate : float, default 0.01
            Share of intervals that go missing in normal operation (1 - completeness).
        rho_low, rho_high : float
            Rate ratios of the lower and upper CUSUMs (default halving and doubling).
        level_memory_s : float, default 3600
            Shortest history, in seconds, of the online level posterior.
        level_memory_max_s : float, default 21600
            Longest history of the level posterior.
        level_information : float, default 60
            The level window runs back from ``level_memory_s`` until it holds this many
            vehicles' worth of weighted expectation (or reaches ``level_memory_max_s``, or the
            start of the local day). A busy detector thus follows the last hour (hour-level
            swings are real and shared by consecutive intervals) while a quiet one pools the
            day so far. Tuning, chosen by simulating weeks with gamma day factors and AR(1)
            hour factors (see the calibration test): a fixed 1-hour window let quiet
            detectors raise twice their budget at F = 0.05, a fixed 3-hour window busy ones
            1.6 times it at F = 1, and windows holding 150 or more vehicles' worth 1.5 times
            it on quiet ones; this rule stayed within 0.7-1.2 of F for peaks of 5 to 120
            vehicles per 5 min at F = 0.05 and F = 1.
        level_guard_s : float, default 1800
            When an interval is flagged, the intervals of the last ``level_guard_s`` before it
            leave the level posterior too (from then on): a shift is usually alarmed within
            minutes, so its onset, scored before the alarm, is not learned as "today's
            level". In normal traffic flags are rare and the level keeps its freshest data.
        min_repeat : int, default 3
            Fewest identical counts in a row that may be flagged.
        shares : Mapping[str, float], optional
            Family shares of the budget (must sum to 1).
        """
        f_total = float(false_alerts_per_week)
        if not f_total > 0:
            raise ValueError("false_alerts_per_week must be positive")
        if not 0 <= level_guard_s <= level_memory_s <= level_memory_max_s:
            raise ValueError("need 0 <= level_guard_s <= level_memory_s <= level_memory_max_s")
        if not interval_ok(int(interval_s)):
            raise ValueError(f"interval_s must be {INTERVAL_RULE_TEXT}; got {interval_s}")
        sh = dict(DEFAULT_SHARES if shares is None else shares)
        if set(sh) != set(DEFAULT_SHARES) or abs(sum(sh.values()) - 1.0) > 1e-9:
            raise ValueError(f"shares must give {sorted(DEFAULT_SHARES)} summing to 1")
        n = SECONDS_PER_WEEK // interval_s
        budget = {
            "no_counts": f_total * sh["no_counts"],
            "low_volume_interval": 0.5 * f_total * sh["low_volume"],
            "low_volume_cusum": 0.5 * f_total * sh["low_volume"],
            "high_volume_interval": 0.5 * f_total * sh["high_volume"],
            "high_volume_cusum": 0.5 * f_total * sh["high_volume"],
            "repeated_value": f_total * sh["repeated_value"],
            "no_data": f_total * sh["no_data"],
        }
        log_a = {k: math.log(v / n) for k, v in budget.items()}
        q = min(max(float(missing_rate), MIN_MISSING_RATE), 0.5)
        missing_run = max(MIN_MISSING_RUN, math.ceil(
            math.log(budget["no_data"] / (n * (1.0 - q))) / math.log(q) - 1e-12))
        expected = dict(budget)
        expected["no_data"] = n * (1.0 - q) * q**missing_run
        windows = (_window_intervals(level_memory_s, interval_s),
                   _window_intervals(level_memory_max_s, interval_s),
                   int(round(level_information * _FIX)))
        if mu_week is None:
            h_low = math.log(n / budget["low_volume_cusum"])
            h_high = math.log(n / budget["high_volume_cusum"])
        else:
            mu, alpha, level_var, ia, sig2 = _typical_predictive(
                mu_week, interval_alpha, day_alpha, log_se, windows)
            mu, alpha = mu.ravel(), alpha.ravel()
            scale = n / mu.size  # bins given may be any sample of the week
            c_lo = _critical_low(mu, alpha, log_a["low_volume_interval"])
            p_lo = np.where(c_lo >= 1, np.exp(log_p_lower(np.maximum(c_lo, 0), mu, alpha))
                            - np.exp(log_pmf(0.0, mu, alpha)), 0.0)
            c_hi = _critical_high(mu, alpha, log_a["high_volume_interval"])
            expected["low_volume_interval"] = scale * float(p_lo.sum())
            expected["high_volume_interval"] = scale * float(
                np.exp(log_p_upper(c_hi, mu, alpha)).sum())
            expected["no_counts"] = scale * _expected_zero_runs(
                mu, alpha, level_var.ravel(), np.broadcast_to(ia, mu.shape).ravel(),
                np.broadcast_to(sig2, mu.shape).ravel(), log_a["no_counts"])
            expected["repeated_value"] = scale * _expected_repeats(
                mu, alpha, log_a["repeated_value"], min_repeat)
            discrete = ("no_counts", "low_volume_interval", "high_volume_interval",
                        "repeated_value", "no_data")
            slack = sum(budget[k] - min(expected[k], budget[k]) for k in discrete)
            overspend = sum(max(expected[k] - budget[k], 0.0) for k in discrete)
            for side in ("low_volume_cusum", "high_volume_cusum"):
                budget[side] = max(0.1 * budget[side], budget[side] + 0.5 * (slack - overspend))
                expected[side] = budget[side]
            h_low = cusum_limit(n / budget["low_volume_cusum"], rho=rho_low, mu=mu, alpha=alpha)
            h_high = cusum_limit(n / budget["high_volume_cusum"], rho=rho_high, mu=mu,
                                 alpha=alpha)
        return cls(
            false_alerts_per_week=f_total,
            interval_s=int(interval_s),
            log_alpha_low=log_a["low_volume_interval"],
            log_alpha_high=log_a["high_volume_interval"],
            log_alpha_zero_run=log_a["no_counts"],
            log_alpha_repeat=log_a["repeated_value"],
            min_repeat=int(min_repeat),
            missing_run=int(missing_run),
            log_missing_rate=math.log(q),
            rho_low=float(rho_low),
            rho_high=float(rho_high),
            h_low=float(h_low),
            h_high=float(h_high),
            level_memory_s=float(level_memory_s),
            level_memory_max_s=float(level_memory_max_s),
            level_information=float(level_information),
            level_guard_s=float(level_guard_s),
            expected_per_week=expected,
        )


# ---------------------------------------------------------------------------------------------
# Timeline scorer
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class WarmState:
    """Everything ``score_timeline`` needs to continue a detector's timeline exactly.

    Fixed-point integers are in units of 2**-24 (vehicles, or natural-log units for CUSUM and
    repeat sums). ``to_dict``/``from_dict`` give a JSON-safe form.
    """

    next_start_s: int
    interval_s: int
    window_y: tuple[int, ...]  # weighted counts of the last W + G intervals (0 if missing)
    window_mu: tuple[int, ...]  # weighted expectations of the same intervals
    window_flag: tuple[int, ...]  # 1 where one of them was flagged
    s_low: int
    s_high: int
    zero_len: int  # present zeros in the run under way (0: none)
    zero_sums: tuple[int, int, int]
    zero_level: float  # level posterior mean when the run began
    zero_level_var: float  # and its relative variance
    repeat_value: float  # last present count (-1: none yet)
    repeat_len: int
    repeat_sum: int
    missing_len: int
    local_day: int | None = None  # local day of the last interval (None: days not given)
    day_age: int = 0  # intervals of that day seen so far

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dictionary of the state."""
        return {
            "next_start_s": self.next_start_s,
            "interval_s": self.interval_s,
            "window_y": list(self.window_y),
            "window_mu": list(self.window_mu),
            "window_flag": list(self.window_flag),
            "s_low": self.s_low,
            "s_high": self.s_high,
            "zero_len": self.zero_len,
            "zero_sums": list(self.zero_sums),
            "zero_level": self.zero_level,
            "zero_level_var": self.zero_level_var,
            "repeat_value": self.repeat_value,
            "repeat_len": self.repeat_len,
            "repeat_sum": self.repeat_sum,
            "missing_len": self.missing_len,
            "local_day": self.local_day,
            "day_age": self.day_age,
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> WarmState:
        """Inverse of ``to_dict``."""
        return cls(
            next_start_s=int(data["next_start_s"]),
            interval_s=int(data["interval_s"]),
            window_y=tuple(int(v) for v in data["window_y"]),
            window_mu=tuple(int(v) for v in data["window_mu"]),
            window_flag=tuple(int(v) for v in data["window_flag"]),
            s_low=int(data["s_low"]),
            s_high=int(data["s_high"]),
            zero_len=int(data["zero_len"]),
            zero_sums=tuple(int(v) for v in data["zero_sums"]),  # type: ignore[arg-type]
            zero_level=float(data["zero_level"]),
            zero_level_var=float(data["zero_level_var"]),
            repeat_value=float(data["repeat_value"]),
            repeat_len=int(data["repeat_len"]),
            repeat_sum=int(data["repeat_sum"]),
            missing_len=int(data["missing_len"]),
            local_day=None if data.get("local_day") is None else int(data["local_day"]),
            day_age=int(data.get("day_age", 0)),
        )

    @classmethod
    def fresh(cls, start_s: int, *, interval_s: int, window: int) -> WarmState:
        """State before a detector's first interval."""
        return cls(int(start_s), int(interval_s), (0,) * window, (0,) * window, (0,) * window,
                   0, 0, 0, (0, 0, 0), 1.0, 0.0, -1.0, 0, 0, 0)


@dataclass(frozen=True)
class Evidence:
    """Per-interval evidence of one detector's timeline.

    Attributes
    ----------
    start_s : int
        Start of the first interval (epoch seconds).
    interval_s : int
        Interval length in seconds.
    flag : Mapping[str, numpy.ndarray]
        For each kind in ``KINDS``, a boolean array: the interval is anomalous of that kind.
    log_p : Mapping[str, numpy.ndarray]
        For each kind, the natural-log p-value (<= 0) of the strongest evidence of that kind at
        the interval (0 where there is none).
    expected : numpy.ndarray
        Posterior predictive mean, vehicles per interval (baseline times today's level).
    level : numpy.ndarray
        Posterior mean of today's level factor (1 = as the baseline expects).
    warm_state : WarmState
        State to pass to the next call to continue the timeline.
    """

    start_s: int
    interval_s: int
    flag: Mapping[str, np.ndarray]
    log_p: Mapping[str, np.ndarray]
    expected: np.ndarray
    level: np.ndarray
    warm_state: WarmState

    @property
    def any_flag(self) -> np.ndarray:
        """True where any kind is flagged."""
        out = np.zeros(self.expected.shape, dtype=bool)
        for kind in KINDS:
            out |= self.flag[kind]
        return out


def _segment_sums(values: np.ndarray, starts_run: np.ndarray, base: int) -> np.ndarray:
    """Running int64 sums that restart where ``starts_run``; the first segment adds ``base``.

    Exact in two's-complement arithmetic even if the global cumulative sum wraps.
    """
    cs = np.cumsum(values)
    idx = np.arange(values.size)
    last = np.maximum.accumulate(np.where(starts_run, idx, -1))
    with np.errstate(over="ignore"):
        prev = np.where(last > 0, cs[np.maximum(last - 1, 0)], 0)
        return np.where(last >= 0, cs - prev, cs + np.int64(base))


def _cusum(z: np.ndarray, s0: int, limit: int, ceiling: int, release: int) -> np.ndarray:
    """Integer CUSUM that holds its alarm: S = max(0, S + z) below ``limit``; once S reaches
    ``limit`` it stays in alarm, with S = min(ceiling, S + z), until it falls below
    ``release``; then it restarts from 0.

    Holding keeps every interval of a lasting shift flagged (so the level posterior, which
    leaves flagged intervals out, does not learn the fault as "today's level"), the release
    level below the limit stops one noisy interval inside a fault from ending the alarm, the
    ceiling bounds how long the alarm outlasts the shift, and restarting from 0 makes alarms a
    renewal process with the Markov-chain ARL between them. Each regime is a Lindley recursion
    (reflected at 0 below, at ``ceiling`` above) run vectorised between switches over stretches
    that grow geometrically.

    Returns
    -------
    (S, in_alarm) arrays.
    """
    n = z.size
    out = np.empty(n, dtype=np.int64)
    alarm = np.zeros(n, dtype=bool)
    # s0 >= release with s0 < limit can only be a held alarm (searching states below limit
    # that reach release are not distinguishable otherwise): a negative s0 encodes it.
    holding = s0 < 0
    pos, s, step = 0, abs(int(s0)), 64
    while pos < n:
        hi = min(n, pos + step)
        w = np.cumsum(z[pos:hi])
        if not holding:  # searching: S = W - min(-s, min W)
            st = w - np.minimum(np.minimum.accumulate(w), -s)
            switch = np.flatnonzero(st >= limit)
        else:  # in alarm: the gap U = ceiling - S is a Lindley recursion on -z
            gap = -w - np.minimum(np.minimum.accumulate(-w), -(ceiling - s))
            st = ceiling - gap
            switch = np.flatnonzero(st < release)
        if switch.size:
            a = int(switch[0])
            out[pos:pos + a + 1] = st[:a + 1]
            if holding:  # the alarm ends here: restart from zero
                alarm[pos:pos + a] = True
                out[pos + a] = 0
                holding = False
            else:
                alarm[pos + a] = True
                holding = True
            s = int(out[pos + a])
            pos, step = pos + a + 1, 64
        else:
            out[pos:hi] = st
            alarm[pos:hi] = holding
            pos, s, step = hi, int(st[-1]), step * 2
    return out, alarm


class _Timeline:
    """One call of ``score_timeline``: inputs, the parts that do not depend on which intervals
    are flagged, and the per-interval results of the current solution."""

    def __init__(self, counts, present, mu, log_se, day_alpha, interval_alpha, cap, thresholds,
                 warm: WarmState, windows: tuple[int, int, int, int], local_day):
        self.th = thresholds
        self.warm = warm
        self.shortest, self.window, self.information, self.guard = windows
        self.hist = self.window  # intervals of history carried between calls
        n = self.n = present.size
        self.present = present
        self.y = np.where(present, counts, 0.0)
        self.mu, self.se2, self.ia = mu, log_se * log_se, interval_alpha
        sig2 = np.expm1(self.se2)
        info_w = 1.0 / (1.0 + (interval_alpha + sig2) * mu)
        # weighted counts and expectations, history first ("ext" index = interval + hist)
        self.qy = np.concatenate([np.asarray(warm.window_y, dtype=np.int64),
                                  np.where(present, _fix(info_w * self.y), 0)])
        self.qm = np.concatenate([np.asarray(warm.window_mu, dtype=np.int64),
                                  np.where(present, _fix(info_w * mu), 0)])
        self.hist_flag = np.asarray(warm.window_flag, dtype=bool)
        with np.errstate(divide="ignore"):
            self.prior = np.where(day_alpha > 0, 1.0 / np.where(day_alpha > 0, day_alpha, 1.0),
                                  np.inf)
        self.over = present & (self.y > cap)
        idx = np.arange(n)
        # intervals of the same local day before each interval: the level window stops there
        self.local_day = local_day
        if local_day is None:
            self.day_age = np.full(n, self.window)
        else:
            new = np.concatenate([[warm.local_day is None or local_day[0] != warm.local_day],
                                  local_day[1:] != local_day[:-1]]) if n else np.zeros(0, bool)
            start = np.maximum.accumulate(np.where(new, idx, -1))
            self.day_age = np.where(start >= 0, idx - start, idx + warm.day_age)
        pidx = np.flatnonzero(present)
        self.pidx = pidx
        yp = self.y[pidx]
        # zero runs (missing intervals neither extend nor break a run)
        isz = yp == 0
        zfirst = isz & np.concatenate([[warm.zero_len == 0], ~isz[:-1]])
        self.zero_start = np.full(n, -2)  # index of the run's first zero; -1: from warm state
        last_first = np.maximum.accumulate(np.where(zfirst, np.arange(pidx.size), -1))
        zstart_p = np.where(last_first >= 0, pidx[np.maximum(last_first, 0)], -1)
        self.zero_start[pidx[isz]] = zstart_p[isz]
        # run sums over the zeros only (other present intervals add nothing and restart nothing)
        zi = np.flatnonzero(isz)
        zf = zfirst[zi]
        self.zero_len_p = np.zeros(pidx.size, dtype=np.int64)
        self.zero_len_p[zi] = _segment_sums(np.ones(zi.size, dtype=np.int64), zf, warm.zero_len)
        sig = np.sqrt(sig2)
        zpos = pidx[zi]
        terms = (mu[zpos], (interval_alpha * mu * mu * (1.0 + sig2))[zpos], (mu * sig)[zpos])
        self.zero_sums_p = []
        for t, base in zip(terms, warm.zero_sums, strict=True):
            full = np.zeros(pidx.size, dtype=np.int64)
            full[zi] = _segment_sums(_fix(t), zf, base)
            self.zero_sums_p.append(full)
        # repeated values: same nonzero count in consecutive present intervals
        prev = np.concatenate([[warm.repeat_value], yp[:-1]])
        rfirst = (yp != prev) | (yp == 0)
        if warm.repeat_len == 0 and pidx.size:
            rfirst[0] = True
        self.rep_first_p = rfirst
        self.rep_len_p = _segment_sums(np.ones(pidx.size, dtype=np.int64), rfirst,
                                       warm.repeat_len)
        # missing runs
        miss = ~present
        mfirst = miss & np.concatenate([[warm.missing_len == 0], present[:-1]])
        mi = np.flatnonzero(miss)
        self.miss_len = np.zeros(n, dtype=np.int64)
        # consecutive missing intervals form a run; a gap in their indices starts a new one
        gap = np.concatenate([[False], np.diff(mi) > 1]) if mi.size else np.zeros(0, bool)
        self.miss_len[mi] = _segment_sums(np.ones(mi.size, dtype=np.int64), mfirst[mi] | gap,
                                          warm.missing_len)
        # results of the current solution
        self.res = {
            "m": np.zeros(n), "level": np.ones(n), "level_var": np.zeros(n),
            "s_low": np.zeros(n, np.int64), "s_high": np.zeros(n, np.int64),
            "rep_sum": np.zeros(n, np.int64), "zref": np.zeros(n), "zref_var": np.zeros(n),
        }
        self.flag = {k: np.zeros(n, dtype=bool) for k in KINDS}
        self.log_p = {k: np.zeros(n) for k in KINDS}
        self.flag["over_capacity"][:] = self.over
        self.flag["no_data"][:] = self.miss_len >= thresholds.missing_run
        self.log_p["no_data"][:] = self.miss_len * thresholds.log_missing_rate

    # -- state just after interval i - 1 -------------------------------------------------------
    def _before(self, key: str, i: int, warm_value):
        return warm_value if i == 0 else self.res[key][i - 1]

    def _side(self, z, key: str, i0: int, h: float):
        """One CUSUM side over the present intervals of a stretch; state is stored signed
        (negative while an alarm is held)."""
        s0 = self._before(key, i0, getattr(self.warm, key))
        stat, alarm = _cusum(_fix(z), int(s0), int(round(h * _FIX)),
                             int(round(h * CUSUM_CEILING * _FIX)),
                             int(round(h * CUSUM_RELEASE * _FIX)))
        return np.where(alarm, -stat, stat), alarm

    def _run(self, i0: int, i1: int, flags: np.ndarray) -> dict[str, Any]:
        """Score intervals [i0, i1) given which earlier intervals (ext index) were flagged."""
        th, w = self.th, self.window
        # Level posterior for interval t (ext index e = t + hist): the recent part, the last
        # `guard` intervals, counts those after the last flag before t (a flag sends the
        # intervals leading up to it out of the level: a shift's onset, scored before its
        # alarm); the older part counts intervals not followed by a flag within the guard.
        # The older part reaches back until the window holds enough information (between
        # `shortest` and `w` intervals in all), never before the start of the local day.
        g, hist = self.guard, self.hist
        base = i0 + hist - w  # the earliest ext index any window here can use
        top = i1 + hist
        qy, qm = self.qy[base:top], self.qm[base:top]
        keep = ~self._left_out(flags[base:top + g])[: top - base]
        cuy = np.concatenate([[0], np.cumsum(qy)])
        cum = np.concatenate([[0], np.cumsum(qm)])
        csy = np.concatenate([[0], np.cumsum(np.where(keep, qy, 0))])
        csm = np.concatenate([[0], np.cumsum(np.where(keep, qm, 0))])
        e = np.arange(i0, i1) + hist - base  # position of t in these cumulative arrays
        day_lo = e - np.minimum(self.day_age[i0:i1], w)
        early = max(0, base - g)  # flags this far back can still cut a recent part
        flagged_at = np.where(flags[early:top], np.arange(early - base, top - base), -g - 1)
        last_flag = np.maximum.accumulate(flagged_at)[e + base - early - 1]
        rec_lo = np.maximum(np.maximum(e - g, last_flag + 1), day_lo)
        rec_m = cum[e] - cum[rec_lo]
        old_hi = np.maximum(e - g, day_lo)
        j = np.searchsorted(csm, csm[old_hi] + rec_m - self.information, side="right") - 1
        old_lo = np.clip(j, e - w, e - self.shortest)
        old_lo = np.minimum(np.maximum(old_lo, day_lo), old_hi)
        sum_y = (cuy[e] - cuy[rec_lo] + csy[old_hi] - csy[old_lo]) / _FIX
        sum_m = (rec_m + csm[old_hi] - csm[old_lo]) / _FIX
        prior = self.prior[i0:i1]
        has_prior = np.isfinite(prior)
        pr = np.where(has_prior, prior, 1.0)
        shape = pr + sum_y
        level = np.where(has_prior, shape / (pr + sum_m), 1.0)
        level_var = np.where(has_prior, 1.0 / shape, 0.0)
        mu = self.mu[i0:i1]
        m = mu * level
        alpha = np.expm1(np.log1p(level_var) + self.se2[i0:i1] + np.log1p(self.ia[i0:i1]))
        # present intervals of this stretch
        p0, p1 = np.searchsorted(self.pidx, [i0, i1])
        pi = self.pidx[p0:p1]
        loc = pi - i0
        yp, mp, ap = self.y[pi], m[loc], alpha[loc]
        lpmf = _log_pmf(yp, mp, ap)
        log_lower, log_upper = _log_tails(yp, mp, ap, lpmf)
        # CUSUMs on present intervals
        sl, ol = _increment_terms(mp, ap, th.rho_low)
        sh, oh = _increment_terms(mp, ap, th.rho_high)
        s_low, alarm_low = self._side(sl * yp + ol, "s_low", i0, th.h_low)
        s_high, alarm_high = self._side(sh * yp + oh, "s_high", i0, th.h_high)
        # repeated values
        rfirst = self.rep_first_p[p0:p1]
        contrib = np.where(rfirst, 0, _fix(lpmf))
        rep_sum = _segment_sums(contrib, rfirst, int(self._before("rep_sum", i0,
                                                                  self.warm.repeat_sum)))
        rep_len = self.rep_len_p[p0:p1]
        lp_rep = np.where(rep_len >= 2, rep_sum / _FIX, 0.0)
        # zero runs, judged against the level as it stood when the run began
        zs = self.zero_start[pi]
        isz = zs >= -1
        zref = np.ones(pi.size)
        zvar = np.zeros(pi.size)
        here = isz & (zs >= i0)
        zref[here] = level[zs[here] - i0]
        zvar[here] = level_var[zs[here] - i0]
        before = isz & (zs >= 0) & (zs < i0)
        zref[before] = self.res["level"][zs[before]]
        zvar[before] = self.res["level_var"][zs[before]]
        warm_run = isz & (zs == -1)
        zref[warm_run] = self.warm.zero_level
        zvar[warm_run] = self.warm.zero_level_var
        sums = [s[p0:p1] / _FIX for s in self.zero_sums_p]
        lp_zero = np.where(isz, _zero_run_log_p(sums[0], sums[1], sums[2], zref, zvar), 0.0)
        # flags and strongest evidence per kind
        f_zero = isz & (lp_zero < th.log_alpha_zero_run)
        f_low = ((yp >= 1) & (log_lower < th.log_alpha_low)) | alarm_low
        f_low &= ~f_zero
        f_high = (log_upper < th.log_alpha_high) | alarm_high
        f_rep = (yp > 0) & (rep_len >= th.min_repeat) & (lp_rep < th.log_alpha_repeat)
        over = self.over[pi]
        out = {
            "loc": loc, "m": m, "level": level, "level_var": level_var,
            "s_low": s_low, "s_high": s_high,
            "rep_sum": rep_sum, "zref": zref, "zref_var": zvar,
            "flags": {"no_counts": f_zero, "low_volume": f_low, "high_volume": f_high,
                      "repeated_value": f_rep, "over_capacity": over},
            "log_p": {
                "no_counts": lp_zero,
                "low_volume": np.minimum(np.where(yp >= 1, log_lower, 0.0),
                                         -np.abs(s_low) / _FIX),
                "high_volume": np.minimum(log_upper, -np.abs(s_high) / _FIX),
                "repeated_value": lp_rep,
                "over_capacity": np.where(over, log_upper, 0.0),
            },
        }
        return out

    def _state_arrays(self, i0: int, i1: int, run: dict[str, Any]) -> dict[str, np.ndarray]:
        """Post-interval state over [i0, i1) as full-length pieces (carried over missing)."""
        n = i1 - i0
        loc = run["loc"]
        has = np.zeros(n, dtype=bool)
        has[loc] = True
        last = np.maximum.accumulate(np.where(has, np.arange(n), -1))
        pos_of = np.full(n, -1)
        pos_of[loc] = np.arange(loc.size)
        src = np.where(last >= 0, pos_of[np.maximum(last, 0)], -1)
        out = {}
        for key, warm_value in (("s_low", self.warm.s_low), ("s_high", self.warm.s_high),
                                ("rep_sum", self.warm.repeat_sum),
                                ("zref", self.warm.zero_level),
                                ("zref_var", self.warm.zero_level_var)):
            vals = run[key]
            carried = self._before(key, i0, warm_value)
            arr = np.where(src >= 0, vals[np.maximum(src, 0)] if vals.size else carried, carried)
            out[key] = arr.astype(vals.dtype if vals.size else np.asarray(carried).dtype)
        out["m"], out["level"], out["level_var"] = run["m"], run["level"], run["level_var"]
        return out

    def _write(self, i0: int, i1: int, run: dict[str, Any], state: dict[str, np.ndarray],
               upto: int) -> None:
        """Store results for [i0, upto) from a run over [i0, i1)."""
        n = upto - i0
        for key, arr in state.items():
            self.res[key][i0:upto] = arr[:n]
        loc = run["loc"]
        keep = loc < n
        for kind in ("no_counts", "low_volume", "high_volume", "repeated_value",
                     "over_capacity"):
            f = self.flag[kind]
            f[i0:upto] = False
            f[i0 + loc[keep]] = run["flags"][kind][keep]
            lp = self.log_p[kind]
            lp[i0:upto] = 0.0
            lp[i0 + loc[keep]] = run["log_p"][kind][keep]

    def _flagged_ext(self) -> np.ndarray:
        out = np.zeros(self.n, dtype=bool)
        for kind in ("no_counts", "low_volume", "high_volume", "repeated_value",
                     "over_capacity"):
            out |= self.flag[kind]
        return np.concatenate([self.hist_flag, out])

    def _left_out(self, flags: np.ndarray) -> np.ndarray:
        """Intervals (ext index) left out of the older part of a level window: every flagged
        interval and every interval a flag follows within the guard."""
        c = np.concatenate([[0], np.cumsum(flags)])
        k = np.arange(flags.size)
        return (c[np.minimum(k + self.guard + 1, flags.size)] - c[k]) > 0

    def solve(self) -> None:
        """Find the causal solution: each interval is scored with a level posterior built from
        the flags raised before it (see ``_run``).

        Scoring everything with a guess of the flagged set is exact up to the first interval
        whose flag differs from the guess; from there the guess is corrected and only a stretch
        is rescored, until the running state (CUSUMs, runs, level window) coincides with the
        previous solution's again, after which that solution stands. Each round fixes at least
        one more interval, and all arithmetic on running sums is exact integer arithmetic, so the
        result is the same as scoring one interval at a time.
        """
        n, hist = self.n, self.hist
        guess = np.concatenate([self.hist_flag, self.over])  # flags, ext index
        run = self._run(0, n, guess)
        self._write(0, n, run, self._state_arrays(0, n, run), n)
        pos = 0
        keys = ("s_low", "s_high", "rep_sum", "zref", "zref_var")
        while True:
            flags = self._flagged_ext()
            diff = np.flatnonzero(flags[pos:] != guess[pos:]) + pos
            if diff.size == 0:
                break
            d = int(diff[0])
            breaks = np.flatnonzero(np.diff(diff) > hist)
            cluster_end = int(diff[breaks[0]]) if breaks.size else int(diff[-1])
            guess[d:cluster_end + 1] = flags[d:cluster_end + 1]
            # a flag at ext index d first matters to interval d - hist + 1; windows stop seeing
            # the cluster from interval cluster_end + 1 on
            need = cluster_end + 1
            lo, step = max(0, d - hist + 1), max(4 * hist, 256)
            while lo < n:
                hi = min(n, max(lo + step, need + 1))
                run = self._run(lo, hi, guess)
                state = self._state_arrays(lo, hi, run)
                same = np.ones(hi - lo, dtype=bool)
                for key in keys:
                    same &= state[key] == self.res[key][lo:hi]
                same[: max(0, need - lo)] = False
                hit = np.flatnonzero(same)
                if hit.size:
                    self._write(lo, hi, run, state, lo + int(hit[0]) + 1)
                    break
                self._write(lo, hi, run, state, hi)
                lo, step = hi, step * 2
            pos = d + 1

    def warm_state(self, start_s: int, interval_s: int) -> WarmState:
        n, warm = self.n, self.warm
        if n == 0:
            return warm
        flagged = self._flagged_ext()
        hist = slice(n, n + self.hist)  # the last `hist` intervals, in ext indices
        r = self.res
        if self.pidx.size:
            last_p = self.pidx.size - 1
            zl = int(self.zero_len_p[last_p])
            zsums = tuple(int(s[last_p]) for s in self.zero_sums_p) if zl else (0, 0, 0)
            rv, rl = float(self.y[self.pidx[-1]]), int(self.rep_len_p[last_p])
        else:
            zl, zsums = warm.zero_len, warm.zero_sums
            rv, rl = warm.repeat_value, warm.repeat_len
        return WarmState(
            next_start_s=int(start_s + n * interval_s),
            interval_s=int(interval_s),
            window_y=tuple(int(v) for v in self.qy[hist]),
            window_mu=tuple(int(v) for v in self.qm[hist]),
            window_flag=tuple(int(v) for v in flagged[hist]),
            s_low=int(r["s_low"][-1]),
            s_high=int(r["s_high"][-1]),
            zero_len=zl,
            zero_sums=zsums,  # type: ignore[arg-type]
            zero_level=float(r["zref"][-1]) if zl else 1.0,
            zero_level_var=float(r["zref_var"][-1]) if zl else 0.0,
            repeat_value=rv,
            repeat_len=rl,
            repeat_sum=int(r["rep_sum"][-1]),
            missing_len=int(self.miss_len[-1]),
            local_day=None if self.local_day is None else int(self.local_day[-1]),
            day_age=int(self.day_age[-1]) + 1,
        )


def _per_interval(value: Any, n: int, name: str) -> np.ndarray:
    arr = np.asarray(value, dtype=float)
    try:
        arr = np.broadcast_to(arr, (n,)).astype(float)
    except ValueError:
        raise ValueError(f"{name} must be a scalar or have one value per interval") from None
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite")
    return arr


def score_timeline(
    start_s: int,
    counts: Any,
    present: Any,
    mu: Any,
    log_se: Any,
    day_alpha: Any,
    interval_alpha: Any,
    *,
    interval_s: int,
    cap: Any,
    thresholds: Thresholds,
    warm_state: WarmState | None = None,
    local_day: Any = None,
) -> Evidence:
    """Score consecutive intervals of one detector, in time order.

    Parameters
    ----------
    start_s : int
        Start of the first interval, epoch seconds. Must equal ``warm_state.next_start_s``
        when continuing.
    counts : array_like
        Vehicles per interval (ignored where not ``present``).
    present : array_like of bool
        False where no count was reported and the interval is past the grace period.
    mu : array_like
        Baseline expected vehicles per interval (> 0).
    log_se : array_like
        Standard error of ``log mu``.
    day_alpha : array_like
        Variance of the gamma day factor (0: no day factor, level fixed at 1).
    interval_alpha : array_like
        Negative binomial alpha of the interval-level excess.
    interval_s : int
        Interval length in seconds.
    cap : int or array_like
        Largest physically plausible count per interval (``capacity_cap``).
    thresholds : Thresholds
        Decision thresholds (``Thresholds.from_budget``) for this ``interval_s``.
    warm_state : WarmState, optional
        State returned by the previous call for the same detector.
    local_day : array_like of int, optional
        The detector's local calendar day of each interval (any integer label, e.g. the
        baseline's day number). The day factor is per local day, so the level window never
        reaches back across a change of day. Without it the window ignores day boundaries,
        which lets yesterday's evening bias tonight's level (more false low/high alerts at
        night on busy detectors).

    Returns
    -------
    Evidence
        Flags and log p-values per kind, the posterior predictive mean, and the state to go on
        with. Scoring a timeline in one call or in consecutive chunks gives identical results.
    """
    if int(interval_s) != thresholds.interval_s:
        raise ValueError("thresholds were derived for a different interval_s")
    present = np.asarray(present, dtype=bool).ravel()
    n = present.size
    counts = np.asarray(counts, dtype=float).ravel()
    if counts.size != n:
        raise ValueError("counts and present must have the same length")
    y = np.where(present, counts, 0.0)
    if np.any(~np.isfinite(y)) or np.any(y < 0) or np.any(y != np.floor(y)):
        raise ValueError("present counts must be non-negative integers")
    mu = _per_interval(mu, n, "mu")
    if np.any(mu <= 0):
        raise ValueError("mu must be positive")
    log_se = _per_interval(log_se, n, "log_se")
    day_alpha = _per_interval(day_alpha, n, "day_alpha")
    interval_alpha = _per_interval(interval_alpha, n, "interval_alpha")
    if np.any(day_alpha < 0) or np.any(interval_alpha < 0) or np.any(log_se < 0):
        raise ValueError("log_se, day_alpha and interval_alpha must be non-negative")
    cap_arr = _per_interval(cap, n, "cap")
    windows = (_window_intervals(thresholds.level_memory_s, int(interval_s)),
               _window_intervals(thresholds.level_memory_max_s, int(interval_s)),
               int(round(thresholds.level_information * _FIX)),
               int(round(thresholds.level_guard_s / int(interval_s))))
    if windows[3] > windows[0]:
        raise ValueError("level_guard_s must not exceed level_memory_s")
    window = windows[1]
    if warm_state is None:
        warm_state = WarmState.fresh(int(start_s), interval_s=int(interval_s), window=window)
    elif (warm_state.next_start_s != int(start_s) or warm_state.interval_s != int(interval_s)
          or len(warm_state.window_y) != window):
        raise ValueError("warm_state does not continue this timeline (start, interval or "
                         "level memory differ)")
    if local_day is not None:
        local_day = np.asarray(local_day).ravel()
        if local_day.size != n or not np.issubdtype(local_day.dtype, np.integer):
            raise ValueError("local_day must give an integer day for every interval")
        local_day = local_day.astype(np.int64)
    tl = _Timeline(y, present, mu, log_se, day_alpha, interval_alpha, cap_arr, thresholds,
                   warm_state, windows, local_day)
    if n:
        tl.solve()
    return Evidence(
        start_s=int(start_s),
        interval_s=int(interval_s),
        flag={k: tl.flag[k] for k in KINDS},
        log_p={k: tl.log_p[k] for k in KINDS},
        expected=tl.res["m"],
        level=tl.res["level"],
        warm_state=tl.warm_state(int(start_s), int(interval_s)),
    )
