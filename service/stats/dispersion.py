"""Overdispersion of counts: tests against Poisson, the Pearson alpha, NB2 maximum likelihood.

Pure numpy/scipy. Counts are vehicles (per interval or per day); alphas are NB2 (variance
``m + alpha m^2``). How the baseline uses them:

Overdispersion
    ``interval_alpha`` comes from interval counts given each day's estimated factor (Pearson
    chi-square equal to its degrees of freedom, Breslow 1984); ``day_alpha`` by negative binomial
    (NB2) maximum likelihood on daily totals against the sum of expected volumes over the day's
    observed bins, after rescaling each total by its interval-level variance inflation (so the
    first two moments are those of NB2). The interval level is tested against Poisson by the
    Dean (1992) score statistic ``sum((y - m)^2 - y) / sqrt(2 sum m^2)`` with the Dean & Lawless
    (1989) leverage correction, the day level by the Pearson chi-square of the (rescaled) daily
    totals, whose reference suits a few large counts. The tests only label the distribution
    ("negative_binomial" when the Bonferroni combination of the two one-sided p-values is
    below :data:`service.stats.baseline.OVERDISPERSION_LEVEL`, otherwise "poisson"): no alpha
    is set to 0 for want of significance. The estimates are pooled partially across day
    types (``service.stats.baseline.pool_alphas``) and the day level is floored at
    :data:`service.stats.baseline.LEVEL_VAR_FLOOR`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import optimize, special, stats

__all__ = ["DispersionTest", "dispersion_test", "negative_binomial_ml", "pearson_alpha"]

@dataclass(frozen=True)
class DispersionTest:
    """Test of Poisson (or a given null variance) against extra NB2 variance.

    Attributes
    ----------
    statistic : float
        ``"score"``: Dean (1992) statistic ``sum((y - m)^2 - v) / sqrt(2 sum v^2)``, standard
        normal under H0. ``"pearson"``: ``sum((y - m)^2 / v)``, chi-square with ``dof`` under H0.
    p_value : float
        One-sided (overdispersion) p-value.
    excess : float
        Moment estimate of the NB2 alpha, ``sum((y - m)^2 - v(1 - h)) / sum(m^2)`` (may be < 0).
    method : str
        ``"score"`` or ``"pearson"``.
    """

    statistic: float
    p_value: float
    excess: float
    method: str = "score"


def dispersion_test(
    counts: Any,
    mean: Any,
    *,
    base_variance: Any = None,
    leverage: Any = None,
    method: str = "score",
) -> DispersionTest:
    """Test counts for overdispersion beyond their null variance.

    ``"score"`` is the score test of Poisson against NB2 (Dean & Lawless 1989; Dean 1992), good
    for many counts of any size. ``"pearson"`` refers the Pearson statistic to chi-square on
    ``n - sum(h)`` degrees of freedom, better for a few large counts (daily totals), where the
    score statistic is too skewed for its normal reference.

    Parameters
    ----------
    counts : array_like
        Observed counts (vehicles per interval, or per day).
    mean : array_like
        Fitted means under the null model.
    base_variance : array_like, optional
        Null variances; default Poisson (``v = m``), and then the score numerator uses ``-y``
        as in Dean's "B" form.
    leverage : array_like, optional
        Hat values ``h`` of the fitted means: the score numerator gains ``sum(h v)`` so that it
        has mean 0 when the means were fitted to the same counts (Dean & Lawless 1989), and the
        Pearson degrees of freedom become ``n - sum(h)``.
    method : str
        ``"score"`` or ``"pearson"``.

    Returns
    -------
    DispersionTest
    """
    if method not in ("score", "pearson"):
        raise ValueError(f"method must be 'score' or 'pearson', got {method!r}")
    y = np.asarray(counts, dtype=float).ravel()
    m = np.asarray(mean, dtype=float).ravel()
    if y.size == 0:
        return DispersionTest(statistic=0.0, p_value=1.0, excess=0.0, method=method)
    resid2 = (y - m) ** 2
    v = m if base_variance is None else np.broadcast_to(
        np.asarray(base_variance, dtype=float).ravel(), y.shape
    )
    h = np.zeros_like(y) if leverage is None else np.broadcast_to(
        np.asarray(leverage, dtype=float).ravel(), y.shape
    )
    numerator = float(np.sum(resid2 - (y if base_variance is None else v)) + np.sum(h * v))
    m2 = float(np.sum(m**2))
    excess = numerator / m2 if m2 > 0 else 0.0
    if method == "pearson":
        dof = y.size - float(np.sum(h))
        positive = v > 0
        statistic = float(np.sum(resid2[positive] / v[positive]))
        p_value = float(stats.chi2.sf(statistic, dof)) if dof > 0 else 1.0
        return DispersionTest(statistic=statistic, p_value=p_value, excess=excess, method=method)
    denominator = math.sqrt(2.0 * float(np.sum(v**2)))
    if denominator <= 0:
        return DispersionTest(statistic=0.0, p_value=1.0, excess=0.0, method=method)
    statistic = numerator / denominator
    return DispersionTest(statistic=statistic, p_value=float(stats.norm.sf(statistic)),
                          excess=excess, method=method)


def pearson_alpha(counts: Any, mean: Any, *, dof: float, exposure: Any = None) -> float:
    """NB2 alpha at which the Pearson chi-square equals its degrees of freedom (Breslow 1984).

    Solves ``sum((y - m)^2 / (m + alpha m^2 / e)) = dof``, with ``e`` the number of intervals summed
    in each count (a sum of ``e`` independent NB intervals has variance ``m + alpha m^2 / e``).

    Parameters
    ----------
    counts : array_like
        Counts, vehicles.
    mean : array_like
        Expected counts, > 0.
    dof : float
        Residual degrees of freedom (number of counts minus effective parameters).
    exposure : array_like, optional
        Intervals summed in each count (default 1).

    Returns
    -------
    float
        alpha >= 0 (0 when the Pearson chi-square is already at or below ``dof``).
    """
    y = np.asarray(counts, dtype=float).ravel()
    m = np.asarray(mean, dtype=float).ravel()
    e = np.ones_like(m) if exposure is None else np.asarray(exposure, dtype=float).ravel()
    r2 = (y - m) ** 2
    q = m * m / e
    if dof <= 0 or np.sum(r2 / m) <= dof:
        return 0.0
    alpha = 0.0
    for _ in range(100):
        v = m + alpha * q
        f = np.sum(r2 / v) - dof
        slope = -np.sum(r2 * q / (v * v))
        step = -f / slope
        alpha += step  # f is convex and decreasing: Newton from the left rises monotonically
        if abs(step) <= 1e-10 * max(alpha, 1e-12):
            break
    return float(max(alpha, 0.0))


def _nb_loglik(y, mean, alpha, weights):
    if alpha <= 0:
        return float(np.sum(weights * (special.xlogy(y, mean) - mean - special.gammaln(y + 1.0))))
    r = 1.0 / alpha
    return float(np.sum(weights * (
        special.gammaln(y + r) - special.gammaln(r) - special.gammaln(y + 1.0)
        + special.xlogy(y, alpha * mean) - (y + r) * np.log1p(alpha * mean)
    )))


def _nb_level(y, base, alpha, weights, level):
    """Level c solving sum w (y - c m) / (1 + alpha c m) = 0 (Newton in log c)."""
    log_c = math.log(level)
    for _ in range(100):
        c = math.exp(log_c)
        m = c * base
        denom = 1.0 + alpha * m
        score = np.sum(weights * (y - m) / denom)
        info = np.sum(weights * m * (1.0 + alpha * y) / denom**2)
        step = score / info
        log_c += step
        if abs(step) < 1e-13:
            break
    return math.exp(log_c)


def negative_binomial_ml(
    counts: Any, mean: Any, *, weights: Any = None, tol: float = 1e-6
) -> tuple[float, float]:
    """Maximum likelihood level and alpha of NB2 counts with means ``level * mean``.

    The model is that of a negative binomial regression on a constant with offset ``log(mean)``
    (variance ``m + alpha m^2``). Counts need not be integers (Poisson-equivalent totals).

    Parameters
    ----------
    counts : array_like
        Counts (e.g. daily vehicle totals).
    mean : array_like
        Expected counts up to a common level, > 0.
    weights : array_like, optional
        Prior weights of the counts.
    tol : float
        Absolute tolerance on ``log(alpha)``.

    Returns
    -------
    level : float
        ML multiplier of ``mean``.
    alpha : float
        ML NB2 alpha (0 when the likelihood is maximized at the Poisson boundary).
    """
    y = np.asarray(counts, dtype=float).ravel()
    base = np.asarray(mean, dtype=float).ravel()
    w = np.ones_like(y) if weights is None else np.asarray(weights, dtype=float).ravel()
    level0 = float(np.sum(w * y) / np.sum(w * base))
    if level0 <= 0:
        return 0.0, 0.0
    m0 = level0 * base
    if np.sum(w * ((y - m0) ** 2 - y)) <= 0:  # score for alpha at 0 is not positive
        return level0, 0.0
    state = {"level": level0}

    def negative_profile(log_alpha: float) -> float:
        alpha = math.exp(log_alpha)
        state["level"] = _nb_level(y, base, alpha, w, state["level"])
        return -_nb_loglik(y, state["level"] * base, alpha, w)

    moment = float(np.sum(w * ((y - m0) ** 2 - y)) / np.sum(w * m0**2))
    center = math.log(max(moment, 1e-12))
    res = optimize.minimize_scalar(
        negative_profile, bounds=(center - 12.0, center + 8.0), method="bounded",
        options={"xatol": tol},
    )
    alpha = math.exp(float(res.x))
    level = _nb_level(y, base, alpha, w, level0)
    if -res.fun <= _nb_loglik(y, m0, 0.0, w):  # boundary: Poisson is at least as likely
        return level0, 0.0
    return level, alpha

