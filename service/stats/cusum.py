"""Log-likelihood-ratio CUSUMs of counts: increments, average run length, decision limit.

Pure numpy/scipy. A one-sided CUSUM of the log-likelihood ratio for a rate ratio ``rho`` (Lucas
1985; Poisson increment ``y ln rho - m (rho - 1)``, negative binomial increment
``y ln rho - (y + 1/alpha) ln((1 + alpha rho m)/(1 + alpha m))``). Its in-control average run
length comes from the Markov chain of Brook & Evans (1972) (:func:`cusum_arl`); the decision
limit h from the alarm rate over a week's bins (:func:`cusum_alarm_rate`, :func:`cusum_limit`).
The scorer runs it on fixed-point increments with a held alarm (:func:`held_cusum`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import linalg

from service.stats.tails import log1p_ratio, log_pmf

__all__ = [
    "CUSUM_CEILING",
    "CUSUM_HOLD_VEHICLES",
    "CUSUM_RELEASE",
    "cusum_alarm_rate",
    "cusum_arl",
    "cusum_increment",
    "cusum_limit",
    "held_cusum",
    "increment_terms",
]

# A CUSUM in alarm is held, capped at CUSUM_CEILING * h, until it falls below CUSUM_RELEASE * h:
# an alarm outlasts the shift that raised it by 0.75 h of in-control drift (one or two intervals
# on a busy detector, about an hour on one seeing 2 vehicles per 5 min).
CUSUM_CEILING = 1.25
CUSUM_RELEASE = 0.5
# An alarm is held for at most this many expected vehicles (then the CUSUM restarts from 0):
# about a day of a busy freeway lane, so a lasting fault stays one alert, while a false alarm
# on a quiet road cannot hold forever. (60 vehicles, tried first, ended the alarm of a dead
# lane after one or two intervals: tests/stats/test_scoring.py.) Our own choice, not a
# published figure; bench/calibration.py measures its effect.
CUSUM_HOLD_VEHICLES = 50_000.0


def increment_terms(mean, alpha, rho):
    """z = slope * y + offset for the log-likelihood ratio of rate rho*mean against mean."""
    mean = np.asarray(mean, dtype=float)
    alpha = np.asarray(alpha, dtype=float)
    am = alpha * mean
    den = 1.0 + am
    u = am * (rho - 1.0) / den
    lratio = np.log1p(u)  # log((1 + alpha rho m) / (1 + alpha m)); 0 for Poisson
    slope = math.log(rho) - lratio
    offset = -mean * (rho - 1.0) / den * log1p_ratio(u, lratio)
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
    slope, offset = increment_terms(mean, alpha, rho)
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
    slope, offset = increment_terms(gmu, gal, rho)
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
    g: np.ndarray = np.bincount(rows + lo.ravel(), weights=(pmf * (1.0 - frac)).ravel(),
                                minlength=k * (2 * t + 1))
    g += np.bincount(rows + hi.ravel(), weights=(pmf * frac).ravel(), minlength=k * (2 * t + 1))
    g = g.reshape(k, 2 * t + 1)  # g[:, t + d]: probability of moving d grid steps
    # A whisker of extra absorption keeps I - R invertible when the mean is so small that the
    # chain almost never moves (ARL is then capped near 1e13 intervals, far beyond any budget).
    g *= 1.0 - 1e-13
    below = np.cumsum(g, axis=1)
    # R[i, j] = g[t + j - i] is Toeplitz except column 0 (at or below zero: back to S = 0),
    # R = T + u e0': with (I - T) a = 1 and (I - T) b = u, Sherman-Morrison gives
    # ARL = [(I - R)^-1 1]_0 = a_0 / (1 - b_0). Levinson recursion (scipy.linalg.solve_toeplitz)
    # costs O(t^2) per chain instead of O(t^3); I - T is a nonsingular M-matrix (T is
    # substochastic), so its leading minors are positive and the recursion does not break down.
    idx = np.arange(t)
    out = np.empty(k)
    for j in range(k):
        column = -g[j, t - idx]
        column[0] += 1.0
        row = -g[j, t + idx]
        row[0] += 1.0
        u = below[j, t - idx] - g[j, t - idx]
        ab = linalg.solve_toeplitz((column, row), np.stack([np.ones(t), u], axis=1),
                                   check_finite=False)
        out[j] = ab[0, 0] / (1.0 - ab[0, 1])
    return out


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
    # log rate is close to linear in h (ARL grows about like e^h), so a secant from two
    # points near Lorden's h = log(ARL0) usually lands within 1e-3 in three or four chain
    # evaluations; a bracket and Brent's method take over otherwise.
    h0, h1 = max(2e-3, 0.85 * -target), max(4e-3, -target)
    g0, g1 = gap(h0), gap(h1)
    known = {h0: g0, h1: g1}
    for _ in range(6):
        if g1 == g0:
            break
        h2 = h1 - g1 * (h1 - h0) / (g1 - g0)
        if not lo < h2 < 4.0 * max(1.0, -target) or abs(h2 - h1) < 1e-3:
            break
        h0, g0, h1, g1 = h1, g1, h2, gap(h2)
        known[h1] = g1
    else:
        h2 = h1
    if abs(h2 - h1) < 1e-3 and g1 <= 0 and any(h < h1 and g > 0 for h, g in known.items()):
        # the root lies within 1e-3 below h1 (the rate at h1 is within budget)
        return float(h1)
    below = [h for h, g in known.items() if g > 0] + [lo]
    above = [h for h, g in known.items() if g <= 0]
    lo = max(below)
    hi = min(above) if above else max(1.0, -target, lo)
    while gap(hi) > 0:
        lo, hi = hi, 1.5 * hi
    # The rate is a step function of h for lattice increments (busy Poisson detectors), so the
    # root is located to 1e-3 in h rather than to an exact rate.
    return float(brentq(gap, lo, hi, xtol=1e-3))



# First stretch of held_cusum's vectorised search (doubling while no regime switch): a day of
# 5-min intervals in one stretch; switches are rare, and a short wasted stretch is cheap.
_FIRST_STEP = 512


def held_cusum(z: np.ndarray, s0: int, limit: int, ceiling: int, release: int,
               expected: np.ndarray | None = None, held0: int = 0, hold_cap: int | None = None
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Integer CUSUM that holds its alarm: S = max(0, S + z) below ``limit``; once S reaches
    ``limit`` it stays in alarm, with S = min(ceiling, S + z), until it falls below
    ``release`` or the hold has lasted more than ``hold_cap`` expected vehicles (``expected``
    per step, ``held0`` already held before the first step); then it restarts from 0.

    Holding keeps every interval of a lasting shift flagged (so the level posterior, which
    down-weights flagged intervals, does not learn the fault as "today's level" at once), the
    release level below the limit stops one noisy interval inside a fault from ending the
    alarm, the ceiling bounds how long the alarm outlasts the shift, the cap in expected
    vehicles bounds how long one alarm can be held at all (a lasting fault alarms again at
    once after the restart on a busy detector; a false alarm on a quiet one no longer lasts
    the day), and restarting from 0 makes alarms a renewal process with the Markov-chain ARL
    between them. Each regime is a Lindley recursion (reflected at 0 below, at ``ceiling``
    above) run vectorised between switches over stretches that grow geometrically.

    Returns
    -------
    (S, in_alarm, held) arrays; ``held`` is the expected vehicles held so far in the alarm
    under way (0 outside an alarm).
    """
    n = z.size
    out = np.empty(n, dtype=np.int64)
    alarm = np.zeros(n, dtype=bool)
    held = np.zeros(n, dtype=np.int64)
    ex = np.zeros(n, dtype=np.int64) if expected is None else expected
    cap = np.iinfo(np.int64).max if hold_cap is None else int(hold_cap)
    # s0 >= release with s0 < limit can only be a held alarm (searching states below limit
    # that reach release are not distinguishable otherwise): a negative s0 encodes it.
    holding = s0 < 0
    pos, s, step = 0, abs(int(s0)), _FIRST_STEP
    h_so_far = int(held0) if holding else 0
    while pos < n:
        hi = min(n, pos + step)
        w = np.cumsum(z[pos:hi])
        if not holding:  # searching: S = W - min(-s, min W)
            st = w - np.minimum(np.minimum.accumulate(w), -s)
            switch = np.flatnonzero(st >= limit)
        else:  # in alarm: the gap U = ceiling - S is a Lindley recursion on -z
            gap = -w - np.minimum(np.minimum.accumulate(-w), -(ceiling - s))
            st = ceiling - gap
            so_far = h_so_far + np.cumsum(ex[pos:hi])
            switch = np.flatnonzero((st < release) | (so_far > cap))
        if switch.size:
            a = int(switch[0])
            out[pos:pos + a + 1] = st[:a + 1]
            if holding:  # the alarm ends here: restart from zero
                alarm[pos:pos + a] = True
                held[pos:pos + a] = so_far[:a]
                out[pos + a] = 0
                holding = False
                h_so_far = 0
            else:
                alarm[pos + a] = True
                held[pos + a] = ex[pos + a]
                h_so_far = int(ex[pos + a])
                holding = True
            s = int(out[pos + a])
            pos, step = pos + a + 1, _FIRST_STEP
        else:
            out[pos:hi] = st
            alarm[pos:hi] = holding
            if holding:
                held[pos:hi] = so_far
                h_so_far = int(so_far[-1])
            pos, s, step = hi, int(st[-1]), step * 2
    return out, alarm, held
