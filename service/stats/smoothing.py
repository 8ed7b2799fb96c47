"""Penalised Poisson fits of per-bin log rates: the time-of-day profile and its smoothness.

Pure numpy/scipy. Rates are vehicles per interval; a profile has one log rate per local
time-of-day bin of a (cyclic) day.

Time-of-day profile
    ``log mu`` is one free parameter per bin, fitted by penalised Poisson maximum likelihood from
    sufficient statistics only (per-bin weighted totals and exposures), so months of history cost
    no more than one day. Smoothness comes from a prior on the cyclic second differences
    ``d[b] = beta[b-1] - 2 beta[b] + beta[b+1]`` (midnight wraps round): Student t with
    :data:`SMOOTHNESS_DF` degrees of freedom and precision ``lambda``. Near zero it acts like the
    usual quadratic penalty ``lambda/2 sum(d^2)``; its heavy tails (as in Kitagawa 1987, JASA
    82:1032-1041, for trends with jumps) make a sharp 15-minute peak cheap, so it is not blurred
    into its neighbors, which a single quadratic penalty does whenever the rest of the day asks
    for strong smoothing. The penalty's pull is also divided by each bin's Fisher information
    ``e * mu``, so busy bins follow their data and quiet ones borrow from their neighbors; every
    rate is ``exp(beta) > 0``, also in bins whose totals are zero. This was preferred to a Fourier
    basis with harmonics chosen by BIC, which needs almost every harmonic for a 15-minute peak and
    rings around it (Gibbs).

Choice of smoothness
    ``lambda`` maximizes the Laplace approximate marginal likelihood (LAML, the REML analogue for
    GLMs; Wood 2011, JRSS B 73:3-36) at the posterior mode: ``l(beta) + log p(d) +
    (n-1)/2 log(lambda) - 1/2 log|H|`` with ``H = diag(w) + lambda D'VD`` and ``V`` the t prior's
    scale-mixture weights. Bins are stored in a folded order (0, n-1, 1, n-2, ...) in which the
    cyclic ``D'VD`` is a band of half-width 4, so ``H`` has a banded Cholesky factor costing O(n)
    and giving ``log|H|`` for free (GCV/UBRE would also need ``trace(H^-1 W)`` at every trial
    ``lambda``). The search walks ``log(lambda)`` in steps of 1.5 from a typical value, warm
    starting each fit, then refines the bracket by Brent. Interval-level overdispersion enters as
    fixed quasi-likelihood variance weights ``1 / (1 + interval_alpha * mu)`` from the previous
    round. The heavy-tailed posterior is not log-concave: the mode found is the one reached from
    the quadratic-penalty fit of the first round.

Generic Poisson GLM
    :func:`poisson_irls`, a (penalised) Poisson regression by IRLS, the textbook reference the
    banded fit is checked against.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import optimize, special
from scipy.linalg import lapack

__all__ = [
    "SMOOTHNESS_DF",
    "FitError",
    "ProfileFit",
    "default_log_penalty",
    "fit_profile",
    "inverse_diagonal",
    "penalised_log_rate_fit",
    "poisson_irls",
    "profile_log_var",
]

SMOOTHNESS_DF = 4.0  # Student-t degrees of freedom of the prior on second differences
_LOG_BETA_CLIP = 50.0
_CURVATURE_FLOOR = 0.1
_SEARCH_STEP = 1.5  # log(lambda) step of the LAML search walk

# ---------------------------------------------------------------------------------------------
# Penalised Poisson fit of per-bin log rates (banded, folded cyclic order)
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class _Penalty:
    perm: np.ndarray  # natural bin at each folded position
    source: np.ndarray  # (5, n) index of each folded band entry in [diag, off1, off2, 0]


@functools.lru_cache(maxsize=16)
def _cyclic_penalty(n: int) -> _Penalty:
    """Folded order and band map of the cyclic second-difference penalty ``D' V D``.

    In natural order ``D' V D`` has diagonal ``v[i-1] + 4 v[i] + v[i+1]``, first off-diagonal
    ``-2 (v[i] + v[i+1])`` and second off-diagonal ``v[i+1]`` (cyclic). In the folded order
    0, n-1, 1, n-2, ... every cyclic neighbor within two bins lies within four positions.
    """
    if n < 5:
        raise ValueError("a cyclic second-difference penalty needs at least 5 bins per day")
    half = (n + 1) // 2
    perm = np.empty(n, dtype=np.intp)
    perm[0::2] = np.arange(half)
    perm[1::2] = n - 1 - np.arange(n - half)
    source = np.full((5, n), 3 * n, dtype=np.intp)
    for k in range(5):
        j = np.arange(n - k)
        a, b = perm[j + k], perm[j]
        off = (a - b) % n
        src = np.full(j.size, 3 * n, dtype=np.intp)
        src[off == 0] = b[off == 0]
        src[off == 1] = n + b[off == 1]
        src[off == n - 1] = n + a[off == n - 1]
        src[off == 2] = 2 * n + b[off == 2]
        src[off == n - 2] = 2 * n + a[off == n - 2]
        source[k, : n - k] = src
    # every non-zero of the penalty must be inside the band
    if np.count_nonzero(source < 3 * n) != 3 * n:  # pragma: no cover - guaranteed by the folding
        raise AssertionError("folded cyclic penalty is not banded")
    perm.setflags(write=False)
    source.setflags(write=False)
    return _Penalty(perm=perm, source=source)


def _second_difference(beta: np.ndarray) -> np.ndarray:
    d = np.empty_like(beta)
    d[1:-1] = beta[:-2] - 2.0 * beta[1:-1] + beta[2:]
    d[0] = beta[-1] - 2.0 * beta[0] + beta[1]
    d[-1] = beta[-2] - 2.0 * beta[-1] + beta[0]
    return d


class FitError(RuntimeError):
    """Numerical failure inside a fit (reported as status "failed")."""


def _hessian_bands(w: np.ndarray, v: np.ndarray, lam: float, pen: _Penalty) -> np.ndarray:
    """Folded lower band storage of ``diag(w) + lam * D' diag(v) D``."""
    n = w.size
    v_next = np.empty_like(v)
    v_next[:-1] = v[1:]
    v_next[-1] = v[0]
    v_prev = np.empty_like(v)
    v_prev[1:] = v[:-1]
    v_prev[0] = v[-1]
    values = np.empty(3 * n + 1)
    values[:n] = lam * (v_prev + 4.0 * v + v_next) + w
    values[n : 2 * n] = -2.0 * lam * (v + v_next)
    values[2 * n : 3 * n] = lam * v_next
    values[3 * n] = 0.0
    return values[pen.source]


def _factor(w: np.ndarray, v: np.ndarray, lam: float, pen: _Penalty) -> np.ndarray:
    chol, info = lapack.dpbtrf(_hessian_bands(w, v, lam, pen), lower=1)
    if info != 0:
        raise FitError("penalised Hessian is not positive definite")
    return chol


def _solve(chol: np.ndarray, rhs: np.ndarray, pen: _Penalty) -> np.ndarray:
    sol, info = lapack.dpbtrs(chol, rhs[pen.perm][:, None], lower=1)
    if info != 0:  # pragma: no cover - dpbtrs only fails on bad arguments
        raise FitError("banded solve failed")
    out = np.empty_like(rhs)
    out[pen.perm] = sol[:, 0]
    return out


def inverse_diagonal(chol: np.ndarray, pen: _Penalty) -> np.ndarray:
    n = chol.shape[1]
    # H^-1 = L^-T L^-1, so its diagonal holds the column sums of squares of L^-1
    inv_l, info = lapack.dtbtrs(chol, np.eye(n), uplo="L")
    if info != 0:  # pragma: no cover
        raise FitError("banded inverse failed")
    out = np.empty(n)
    out[pen.perm] = np.einsum("ij,ij->j", inv_l, inv_l)
    return out


def _log_prior(d: np.ndarray, lam: float, nu: float | None) -> float:
    """Log density of the second differences ``d``, up to terms free of lambda and beta.

    Gaussian with precision ``lam`` when ``nu`` is None, else Student t with ``nu`` degrees of
    freedom and scale ``1/sqrt(lam)``.
    """
    if nu is None:
        return -0.5 * lam * float(np.dot(d, d))
    return -0.5 * (nu + 1.0) * float(np.sum(np.log1p(lam * d * d / nu)))


def _prior_weights(d: np.ndarray, lam: float, nu: float | None) -> np.ndarray:
    """Scale-mixture weights ``v``: the prior's gradient is ``-lam * v * d`` (1 if Gaussian)."""
    if nu is None:
        return np.ones_like(d)
    return (nu + 1.0) / (nu + lam * d * d)


def _curvature_share(d: np.ndarray, lam: float, nu: float | None) -> np.ndarray | float:
    """Share of the majoriser's curvature ``lam * v`` that the t prior really has (floored).

    The true second derivative of ``(nu + 1)/2 log(1 + lam d^2/nu)`` is
    ``lam v (nu - lam d^2)/(nu + lam d^2)``. Newton with it converges in a few steps where the
    majoriser (IRLS) needs hundreds; the floor keeps the matrix positive definite on sharp
    features, where the true curvature is negative. A line search keeps every step an ascent.
    """
    if nu is None:
        return 1.0
    x = lam * d * d
    return np.maximum((nu - x) / (nu + x), _CURVATURE_FLOOR)


def _penalised_newton(totals, exposures, inv_phi, lam, nu, beta, pen, *, tol=1e-7, max_iter=100):
    """Penalised quasi-Poisson log rates at fixed lambda.

    Newton steps (for the Student-t prior with the floored true curvature of
    :func:`_curvature_share`) with step halving on the exact objective, until the Newton
    decrement ``grad' step`` falls below ``tol`` (log-likelihood units). The heavy-tailed
    objective is not concave: near a saddle the iterates can creep for a long time while every
    bin is already within ~1e-5 of its final log rate, which is why the decrement, not the step,
    decides, and why running out of iterations returns the last (improved) point instead of
    failing. Returns the log rates, the objective, the Cholesky factor of
    ``diag(w) + lam D' V D`` (the scale-mixture Hessian used for the marginal likelihood and the
    covariance) and the information ``w``.
    """
    t_phi = totals * inv_phi
    e_phi = exposures * inv_phi

    def evaluate(b):
        mu_b = np.exp(b)
        d_b = _second_difference(b)
        return float(np.dot(t_phi, b) - np.dot(e_phi, mu_b)) + _log_prior(d_b, lam, nu), mu_b, d_b

    objective, mu, d = evaluate(beta)
    for _ in range(max_iter):
        w = e_phi * mu
        v = _prior_weights(d, lam, nu)
        grad = t_phi - w - lam * _second_difference(v * d)
        chol = _factor(w, v * _curvature_share(d, lam, nu), lam, pen)
        step = _solve(chol, grad, pen)
        largest = float(np.abs(step).max())
        if largest > 3.0:  # damp wild first steps from a poor start
            step *= 3.0 / largest
            largest = 3.0
        scale = 1.0
        while True:
            trial = np.clip(beta + scale * step, -_LOG_BETA_CLIP, _LOG_BETA_CLIP)
            trial_objective, trial_mu, trial_d = evaluate(trial)
            if trial_objective >= objective - 1e-12 * abs(objective) or scale < 1e-6:
                break
            scale *= 0.5
        beta, objective, mu, d = trial, trial_objective, trial_mu, trial_d
        if scale * float(np.dot(grad, step)) < tol or largest * scale < 1e-9:
            break
    if not np.isfinite(objective):
        raise FitError("penalised Poisson fit diverged")
    w = e_phi * mu
    return beta, objective, _factor(w, _prior_weights(d, lam, nu), lam, pen), w


@dataclass(frozen=True, eq=False)
class ProfileFit:
    beta: np.ndarray
    log_penalty: float
    laml: float
    chol: np.ndarray
    info: np.ndarray  # per-bin Fisher information e * mu / phi


def profile_log_var(fit: ProfileFit) -> np.ndarray:
    """Diagonal of the Bayesian covariance ``H^-1`` of a profile fit's log rates."""
    return inverse_diagonal(fit.chol, _cyclic_penalty(fit.beta.size))


def _start_beta(totals: np.ndarray, exposures: np.ndarray) -> np.ndarray:
    rate = totals.sum() / max(exposures.sum(), 1e-300)
    return np.log((totals + 0.5 * rate) / (exposures + 0.5))


def penalised_log_rate_fit(
    totals: Any,
    exposures: Any,
    *,
    interval_alpha: float | Any = 0.0,
    smoothness_df: float | None = SMOOTHNESS_DF,
    log_penalty: float | None = None,
    log_penalty_bounds: tuple[float, float] | None = None,
    start: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, dict]:
    """Smooth periodic time-of-day log rates from per-bin totals and exposures.

    Maximises ``sum(totals*beta - exposures*exp(beta)) / phi + log p(D beta)`` where ``D`` is the
    cyclic second difference, ``phi = 1 + interval_alpha * mu`` fixed variance weights, and
    ``p`` a Gaussian (``smoothness_df=None``: the penalty ``lambda/2 |D beta|^2``) or Student-t
    prior with ``smoothness_df`` degrees of freedom and precision ``lambda``. ``lambda``
    maximizes the Laplace approximate marginal likelihood unless given.

    Parameters
    ----------
    totals : array_like, shape (n_bins,)
        (Weighted) vehicles counted in each bin over all days.
    exposures : array_like, shape (n_bins,)
        (Weighted) number of intervals observed in each bin.
    interval_alpha : float or array_like
        Interval-level NB alpha (scalar), or per-bin variance inflation phi when an array.
    smoothness_df : float or None
        Degrees of freedom of the Student-t prior on second differences (default as in
        :func:`service.stats.baseline.fit_baseline`); None = Gaussian, i.e. the plain quadratic penalty.
    log_penalty : float, optional
        Fixed ``log(lambda)``; searched when omitted.
    log_penalty_bounds : (float, float), optional
        Search bounds for ``log(lambda)``; default spans unsmoothed to nearly flat.
    start : numpy.ndarray, optional
        Starting log rates.

    Returns
    -------
    log_rate : numpy.ndarray
        Fitted ``log(mu)`` per bin (mu in vehicles per interval).
    log_rate_var : numpy.ndarray
        Diagonal of the Bayesian covariance ``H^-1`` of the log rates.
    smoothing : dict
        ``penalty``, ``log_penalty``, ``effective_df``, ``laml``.
    """
    totals = np.asarray(totals, dtype=float)
    exposures = np.asarray(exposures, dtype=float)
    phi = np.asarray(interval_alpha, dtype=float)
    if phi.ndim == 0:
        phi = 1.0 + float(phi) * totals / np.maximum(exposures, 1e-300)
    fit = fit_profile(totals, exposures, 1.0 / phi, nu=smoothness_df, log_penalty=log_penalty,
                       bounds=log_penalty_bounds, start=start)
    var = inverse_diagonal(fit.chol, _cyclic_penalty(totals.size))
    smoothing = {
        "penalty": math.exp(fit.log_penalty),
        "log_penalty": fit.log_penalty,
        "effective_df": float(np.dot(fit.info, var)),
        "laml": fit.laml,
    }
    return fit.beta, var, smoothing


def default_log_penalty(totals: np.ndarray, inv_phi: np.ndarray) -> float:
    """Starting guess for log(lambda): typical fits land 2-7 above log(mean information)."""
    return math.log(max(float(np.mean(totals * inv_phi)), 1e-12)) + 4.0


class _LamlSearch:
    """LAML of the profile fit as a function of ``rho = log(lambda)``, remembering every
    value seen and the best fit so far; each fit is warm-started from the previous one."""

    def __init__(self, totals, exposures, inv_phi, *, nu, beta):
        self.totals, self.exposures, self.inv_phi, self.nu = totals, exposures, inv_phi, nu
        self.n = totals.size
        self.pen = _cyclic_penalty(self.n)
        self.beta = beta
        self.best: tuple | None = None
        self.seen: dict[float, float] = {}

    def __call__(self, rho: float) -> float:
        """Negative LAML at ``rho`` (what scipy's minimizers minimize)."""
        rho = float(rho)
        if rho in self.seen:
            return self.seen[rho]
        lam = math.exp(rho)
        b, objective, chol, w = _penalised_newton(
            self.totals, self.exposures, self.inv_phi, lam, self.nu, self.beta, self.pen
        )
        self.beta = b
        laml = objective + 0.5 * (self.n - 1) * rho - float(np.log(chol[0]).sum())
        if self.best is None or laml > self.best[0]:
            self.best = (laml, rho, b, chol, w)
        self.seen[rho] = -laml
        return -laml

    def result(self) -> ProfileFit:
        assert self.best is not None
        laml, rho, b, chol, w = self.best
        return ProfileFit(beta=b, log_penalty=rho, laml=laml, chol=chol, info=w)


def _walk_to_laml_peak(evaluate: _LamlSearch, rho: float, *, xatol: float) -> None:
    """Walk ``rho`` in steps of :data:`_SEARCH_STEP` uphill in LAML, then refine the last
    bracket by bounded Brent."""
    step = _SEARCH_STEP
    here = evaluate(rho)
    if evaluate(rho + step) < here:
        direction = 1.0
    elif evaluate(rho - step) < here:
        direction = -1.0
    else:
        direction = 0.0
    if direction:
        rho += direction * step
        here = evaluate.seen[rho]
        for _ in range(40):  # LAML is flat far out; 40 steps span e^+-60 in lambda
            ahead = evaluate(rho + direction * step)
            if ahead >= here:
                break
            rho, here = rho + direction * step, ahead
    optimize.minimize_scalar(evaluate, bounds=(rho - step, rho + step), method="bounded",
                             options={"xatol": xatol})


def fit_profile(totals, exposures, inv_phi, *, nu, log_penalty=None, guess=None, bounds=None,
                start=None, xatol=0.1) -> ProfileFit:
    """Profile fit at a fixed ``log_penalty``, or with ``log(lambda)`` maximizing LAML.

    The search walks from ``guess`` in steps of :data:`_SEARCH_STEP` (each fit warm-started
    from the previous one, so each takes a few Newton steps) until LAML falls, then refines
    the bracket by bounded Brent; ``bounds`` instead searches that interval by Brent alone.
    Raises :class:`FitError` on non-finite or empty data.
    """
    _cyclic_penalty(totals.size)  # fewer than 5 bins is a ValueError before anything else
    if not np.all(np.isfinite(totals)) or not np.all(np.isfinite(exposures)):
        raise FitError("non-finite totals or exposures")
    if totals.sum() <= 0 or exposures.sum() <= 0:
        raise FitError("no vehicles counted")
    beta = _start_beta(totals, exposures) if start is None else np.array(start, dtype=float)
    evaluate = _LamlSearch(totals, exposures, inv_phi, nu=nu, beta=beta)
    if log_penalty is not None:
        evaluate(float(log_penalty))
    elif bounds is not None:
        optimize.minimize_scalar(evaluate, bounds=bounds, method="bounded",
                                 options={"xatol": xatol})
    else:
        rho = default_log_penalty(totals, inv_phi) if guess is None else float(guess)
        _walk_to_laml_peak(evaluate, rho, xatol=xatol)
    return evaluate.result()


# ---------------------------------------------------------------------------------------------
# Generic Poisson GLM
# ---------------------------------------------------------------------------------------------


def poisson_irls(
    X: Any,
    y: Any,
    exposure: Any,
    *,
    penalty: Any = None,
    weights: Any = None,
    max_iter: int = 100,
    tol: float = 1e-12,
) -> tuple[np.ndarray, np.ndarray]:
    """Poisson GLM, log link, offset ``log(exposure)``, by iteratively reweighted least squares.

    Maximises ``sum(weights * (y*eta - exposure*exp(eta))) - 1/2 coef' penalty coef`` with
    ``eta = X @ coef``.

    Parameters
    ----------
    X : array_like, shape (n, p)
        Design matrix.
    y : array_like, shape (n,)
        Counts (vehicles per interval).
    exposure : array_like, shape (n,)
        Exposure of each row (e.g. number of intervals), > 0.
    penalty : array_like, shape (p, p), optional
        Quadratic penalty matrix (already multiplied by its smoothing parameter).
    weights : array_like, shape (n,), optional
        Prior weights.
    max_iter : int
        Maximum IRLS iterations.
    tol : float
        Convergence tolerance on the relative change of the penalised deviance.

    Returns
    -------
    coef : numpy.ndarray, shape (p,)
        Coefficients (log rate scale).
    covariance : numpy.ndarray, shape (p, p)
        ``(X' W X + penalty)^-1`` at convergence (Bayesian covariance when penalised).
    """
    X = np.asarray(X, dtype=float)
    y = np.asarray(y, dtype=float)
    offset = np.log(np.asarray(exposure, dtype=float))
    n, p = X.shape
    prior = np.ones(n) if weights is None else np.asarray(weights, dtype=float)
    S = np.zeros((p, p)) if penalty is None else np.asarray(penalty, dtype=float)
    mu = (y + y.mean()) / 2.0 + 1e-8  # count scale start (as in R's glm)
    eta = np.log(mu)
    coef = np.zeros(p)
    previous = np.inf
    for _ in range(max_iter):
        z = eta - offset + (y - mu) / mu
        w = prior * mu
        A = X.T @ (w[:, None] * X) + S
        coef = np.linalg.solve(A, X.T @ (w * z))
        eta = X @ coef + offset
        mu = np.exp(eta)
        dev = 2.0 * np.sum(prior * (special.xlogy(y, y / mu) - (y - mu))) + coef @ S @ coef
        if abs(dev - previous) <= tol * (abs(dev) + 0.1):
            break
        previous = dev
    w = prior * mu
    covariance = np.linalg.inv(X.T @ (w[:, None] * X) + S)
    return coef, covariance

