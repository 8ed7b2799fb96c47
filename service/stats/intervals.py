"""Intervals for counts: exact Poisson confidence limits and the predictive interval of a count.

Pure numpy/scipy; counts and means are vehicles per interval.

Uncertainty
    ``log_se**2 = diag(H^-1)`` (the Bayesian covariance of the penalised fit, Wood 2006) plus
    ``day_alpha / D_eff`` for the overall level, which is an average of ``D_eff`` day factors. With
    forgetting weights ``H^-1`` is conservative (effective information exceeds the weighted total).
    :func:`predictive_interval` treats a new count as Poisson with a gamma-mixed mean whose
    relative variance matches all three sources: NB with ``1 + alpha = exp(log_se^2)
    (1 + day_alpha)(1 + interval_alpha)``, and takes mid-p (Lancaster 1961) quantiles so that
    coverage is close to nominal on average rather than always above it.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy import stats

__all__ = ["garwood_interval", "predictive_interval"]

def garwood_interval(x: Any, *, level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Exact central confidence interval for a Poisson mean from one count (Garwood 1936).

    Parameters
    ----------
    x : array_like of int
        Observed counts (vehicles).
    level : float
        Confidence level.

    Returns
    -------
    low, high : numpy.ndarray of float
        ``chi2.ppf((1-level)/2, 2x) / 2`` (0 when x = 0) and ``chi2.ppf((1+level)/2, 2x + 2) / 2``.
    """
    x = np.asarray(x, dtype=float)
    tail = (1.0 - level) / 2.0
    with np.errstate(invalid="ignore"):
        low = np.where(x > 0, stats.chi2.ppf(tail, 2.0 * np.maximum(x, 1.0)) / 2.0, 0.0)
    high = stats.chi2.ppf(1.0 - tail, 2.0 * x + 2.0) / 2.0
    return low, high


def _mixture_alpha(log_se, day_alpha, interval_alpha):
    # exp(se^2) (1 + a_day)(1 + a_int) - 1, without cancellation when all three are tiny
    var = np.square(log_se)
    return np.expm1(var) + np.exp(var) * (day_alpha + interval_alpha + day_alpha * interval_alpha)


def predictive_interval(
    mu: Any,
    log_se: Any,
    day_alpha: Any,
    interval_alpha: Any,
    *,
    level: float = 0.95,
) -> tuple[np.ndarray, np.ndarray]:
    """Central predictive interval for one new count, all three variance sources combined.

    The new count is Poisson given a mean ``mu * G``; ``G`` has mean 1 and relative variance
    ``exp(log_se^2)(1 + day_alpha)(1 + interval_alpha) - 1`` (estimation error, an unknown day
    factor and the interval-level excess), moment-matched by a gamma, i.e. a negative binomial.
    Endpoints are mid-p quantiles (Lancaster 1961): ``low`` is the smallest ``y`` with
    ``P(Y < y) + P(Y = y)/2 >= (1 - level)/2`` and ``high`` the largest with
    ``P(Y > y) + P(Y = y)/2 >= (1 - level)/2``, so coverage is close to ``level`` on average.

    Parameters
    ----------
    mu : array_like
        Expected vehicles per interval, > 0.
    log_se : array_like
        Standard error of ``log(mu)``.
    day_alpha, interval_alpha : array_like
        Day-level and interval-level NB alphas (0 = none).
    level : float
        Nominal coverage.

    Returns
    -------
    low, high : numpy.ndarray of int64
        Inclusive bounds, vehicles per interval.
    """
    mu, log_se, day_alpha, interval_alpha = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (mu, log_se, day_alpha, interval_alpha))
    )
    alpha = np.maximum(_mixture_alpha(log_se, day_alpha, interval_alpha), 0.0)
    tail = (1.0 - level) / 2.0
    poisson = alpha < 1e-10
    size = 1.0 / np.where(poisson, 1.0, alpha)
    prob = size / (size + mu)

    def cdf(k):
        return np.where(poisson, stats.poisson.cdf(k, mu), stats.nbinom.cdf(k, size, prob))

    def pmf(k):
        return np.where(poisson, stats.poisson.pmf(k, mu), stats.nbinom.pmf(k, size, prob))

    def ppf(q):
        return np.where(poisson, stats.poisson.ppf(q, mu), stats.nbinom.ppf(q, size, prob))

    lo = ppf(tail)  # smallest y with F(y) >= tail; the mid-p answer is lo or lo + 1
    lo = np.where(cdf(lo) - 0.5 * pmf(lo) >= tail, lo, lo + 1.0)
    hi = ppf(1.0 - tail)  # the mid-p answer is hi or hi - 1
    hi = np.where(cdf(hi) - 0.5 * pmf(hi) <= 1.0 - tail, hi, hi - 1.0)
    hi = np.maximum(hi, lo)
    return lo.astype(np.int64), hi.astype(np.int64)

