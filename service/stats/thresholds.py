"""Decision thresholds of every test, derived from one weekly false-alert budget.

Pure numpy/scipy. :class:`Thresholds` is a frozen value (stored as JSON:
``Thresholds(**dataclasses.asdict(th))`` round-trips it); :func:`calibrate` is the derivation
from the budget and, optionally, the detector's week of expected volumes.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import special, stats

from service.domain import INTERVAL_RULE_TEXT, interval_ok
from service.stats.cusum import cusum_limit
from service.stats.fixedpoint import FIX_SCALE, to_fixed
from service.stats.tails import log_p_lower, log_p_upper, log_pmf, log_pmf_flat, zero_run_log_p

__all__ = [
    "DEFAULT_SHARES",
    "MIN_MISSING_RATE",
    "MIN_MISSING_RUN",
    "SECONDS_PER_WEEK",
    "Thresholds",
    "calibrate",
    "log_repeat_p",
    "window_intervals",
]

SECONDS_PER_WEEK = 7 * 24 * 3600
# Bonferroni-style split of the weekly budget across the statistical test families; inside the
# low and high volume families half goes to the single-interval tail test and half to the CUSUM.
DEFAULT_SHARES = {
    "zero_counts": 0.2,
    "low_volume": 0.2,
    "high_volume": 0.2,
    "repeated_value": 0.2,
    "no_reports": 0.2,
}
# The rate a detector's missing rate is floored at: with perfect completeness a lone gap would
# otherwise be "impossible". Runs shorter than MIN_MISSING_RUN are never an alert.
MIN_MISSING_RATE = 1e-3
MIN_MISSING_RUN = 2


REPEAT_GRID_SD = 20.0  # predictive SD (vehicles) beyond which log_repeat_p takes its normal limit


def log_repeat_p(mu: Any, alpha: Any) -> np.ndarray:
    """Log probability that an interval repeats the nonzero count of the interval before it.

    Both counts are taken from the same predictive distribution (NB2 with mean ``mu`` and
    variance ``mu + alpha mu^2``; Poisson where ``alpha`` is 0), so the probability is the
    collision probability of the nonzero counts, ``sum_{v>=1} p(v)^2 / (1 - p(0))``: how
    unlikely a repetition is, whatever the repeated value. Where the predictive SD exceeds
    :data:`REPEAT_GRID_SD` the collision integral of the moment-matched gamma density is
    used (relative error about 1 % or less there; checked against the exact sum in the tests). For Poisson the full sum
    ``sum_{v>=0} p(v)^2`` is ``exp(-2 mu) I0(2 mu)`` (series of the modified Bessel function,
    Abramowitz & Stegun 9.6.10), the tests' reference.

    Parameters
    ----------
    mu : array_like
        Expected vehicles per interval (> 0).
    alpha : array_like
        Predictive NB2 alpha (>= 0).

    Returns
    -------
    numpy.ndarray
        Natural log of the repeat probability (<= 0), broadcast shape of the inputs.
    """
    m, a = np.broadcast_arrays(np.asarray(mu, dtype=float), np.asarray(alpha, dtype=float))
    shape = m.shape
    m, a = np.maximum(m.ravel(), 1e-12), np.maximum(a.ravel(), 0.0)
    sd = np.sqrt(m + a * m * m)
    on_grid = sd <= REPEAT_GRID_SD
    out = np.empty(m.shape)
    if not on_grid.all():  # the gamma limit only where the grid does not serve
        wide = ~on_grid
        out[wide] = _log_repeat_gamma(m[wide], sd[wide])
    small = np.flatnonzero(on_grid)
    width = int(math.ceil(24.0 * REPEAT_GRID_SD)) + 12
    pieces = max(1, small.size * width // 2_000_000)
    for chunk in [small] if pieces == 1 else np.array_split(small, pieces):
        if chunk.size == 0:
            continue
        mc, ac, sc = m[chunk], a[chunk], sd[chunk]
        first = np.maximum(1.0, np.floor(mc - 12.0 * sc))
        # each row's own grid (12 SD either side, 10 more above), all rows in one flat array
        span = (np.ceil(mc + 12.0 * sc + 10.0) - first).astype(np.int64) + 1
        starts = np.concatenate([[0], np.cumsum(span[:-1])])
        row = np.repeat(np.arange(chunk.size), span)
        v = first[row] + (np.arange(row.size) - starts[row])
        lp = log_pmf_flat(v, mc[row], ac[row])
        top = np.maximum.reduceat(lp, starts)
        log_sum = 2.0 * top + np.log(np.add.reduceat(np.exp(2.0 * (lp - top[row])), starts))
        log_p0 = log_pmf_flat(np.zeros(chunk.size), mc, ac)
        out[chunk] = log_sum - np.log(-np.expm1(log_p0))
    return np.minimum(out, 0.0).reshape(shape)


def _log_repeat_gamma(m, sd):
    """Log collision integral of the moment-matched gamma density (shape k = m^2 / sd^2, scale
    sd^2 / m): Gamma(2k - 1) / (Gamma(k)^2 2^(2k - 1) scale); for large k the normal limit
    1 / (2 sqrt(pi) sd)."""
    k = np.maximum(m * m / (sd * sd), 0.75)
    return (special.gammaln(2.0 * k - 1.0) - 2.0 * special.gammaln(k)
            - (2.0 * k - 1.0) * math.log(2.0) - np.log(sd * sd / m))


def window_intervals(level_memory_s: float, interval_s: int) -> int:
    """Intervals (at least 1) in a level-memory length of ``level_memory_s`` seconds."""
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
    qm = to_fixed(mu / (1.0 + (ia + sig2) * mu))
    reps = 1 + -(-longest // n)
    c = np.concatenate([[0], np.cumsum(np.tile(qm, reps + 1))])
    ends = np.arange(n) + reps * n
    k = _level_windows(c, ends, shortest=shortest, longest=longest, information=information)
    seen = (c[ends] - c[ends - k]) / FIX_SCALE
    with np.errstate(divide="ignore"):
        shape = np.where(da > 0, 1.0 / np.where(da > 0, da, 1.0) + seen, np.inf)
    level_var = np.where(np.isfinite(shape), 1.0 / shape, 0.0)
    alpha = np.expm1(np.log1p(level_var) + se * se + np.log1p(ia))
    return mu, alpha, level_var, ia, sig2


def _critical_low(mu, alpha, log_a):
    """Largest y with log P(Y <= y) < log_a (-1 if none), per bin."""
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
        return zero_run_log_p(c1[e] - c1[s], c2[e] - c2[s], c3[e] - c3[s], 1.0, level_var)

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
    """Expected repeated-value alerts per week: a run of ``k`` equal nonzero counts is flagged
    once ``(k - 1) log_repeat_p`` falls below ``log_a``; its chance at a run start is
    ``sum_v P(y_{s-1} != v) P(y_s = v)^k``, each bin's predictive held over the run. The
    repeat probability comes from the same pmf grid (as ``log_repeat_p`` computes it)."""
    total = 0.0
    sd_all = np.sqrt(mu + alpha * mu * mu)
    for chunk in np.array_split(np.arange(mu.size), max(1, mu.size // 512)):
        m, a, sd = mu[chunk], alpha[chunk], sd_all[chunk]
        vmax = int(np.max(m + 12.0 * sd + 10.0))
        v = np.arange(1, vmax + 1, dtype=float)[None, :]
        lp = log_pmf(v, m[:, None], a[:, None])
        top = np.max(lp, axis=1)
        grid = 2.0 * top + np.log(np.sum(np.exp(2.0 * (lp - top[:, None])), axis=1))
        grid -= np.log(-np.expm1(log_pmf(0.0, m, a)))
        lr = np.where(sd <= REPEAT_GRID_SD, grid, _log_repeat_gamma(m, np.maximum(sd, 1e-12)))
        lr = np.minimum(lr, -1e-300)
        k = np.maximum(min_repeat, 1 + np.ceil(log_a / lr))[:, None]
        total += float(np.sum((1.0 - np.exp(lp)) * np.exp(lp * k)))
    return total


@dataclass(frozen=True)
class Thresholds:
    """Decision thresholds for every test, derived from one false-alert budget (:func:`calibrate`).

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
        Missing intervals in a row that make a ``no_reports`` alert.
    log_missing_rate : float
        Natural log of the detector's missing rate used for ``no_reports`` evidence.
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
        (``repeated_value`` and the CUSUMs approximate; see :func:`calibrate`).
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


def calibrate(
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
    zero_counts, low_volume, high_volume, repeated_value, no_reports; over_capacity needs none,
    its cap sits far above normal traffic). Per-interval significance is the family share
    over n (Bonferroni); low_volume and high_volume give half to the single-interval test
    and half to the CUSUM. ``no_reports`` needs the shortest run L >= 2 of missing intervals
    with ``n (1 - q) q^L`` at most its share, q the missing rate.

    With ``mu_week`` (the detector's expected vehicles for each interval of a week, and the
    same-length or scalar baseline dispersion) the discrete tests' expected false alerts
    are computed under the model: exactly for the single-interval tests and for no_reports;
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
    _check_calibration(f_total, interval_s=interval_s, level_memory_s=level_memory_s,
                       level_memory_max_s=level_memory_max_s, level_guard_s=level_guard_s)
    sh = _checked_shares(shares)
    n = SECONDS_PER_WEEK // interval_s
    budget = _family_budgets(f_total, sh)
    log_a = {k: math.log(v / n) for k, v in budget.items()}
    q = min(max(float(missing_rate), MIN_MISSING_RATE), 0.5)
    missing_run = _missing_run(budget["no_reports"], n, q)
    expected = dict(budget)
    expected["no_reports"] = n * (1.0 - q) * q**missing_run
    windows = (window_intervals(level_memory_s, interval_s),
               window_intervals(level_memory_max_s, interval_s),
               int(round(level_information * FIX_SCALE)))
    if mu_week is None:
        h_low = math.log(n / budget["low_volume_cusum"])
        h_high = math.log(n / budget["high_volume_cusum"])
    else:
        mu, alpha, level_var, ia, sig2 = _typical_predictive(
            mu_week, interval_alpha, day_alpha, log_se, windows)
        mu, alpha = mu.ravel(), alpha.ravel()
        expected.update(_expected_discrete(
            mu, alpha, level_var.ravel(), np.broadcast_to(ia, mu.shape).ravel(),
            np.broadcast_to(sig2, mu.shape).ravel(), log_a, min_repeat=min_repeat,
            scale=n / mu.size))  # bins given may be any sample of the week
        _move_slack_to_cusums(budget, expected)
        h_low = cusum_limit(n / budget["low_volume_cusum"], rho=rho_low, mu=mu, alpha=alpha)
        h_high = cusum_limit(n / budget["high_volume_cusum"], rho=rho_high, mu=mu, alpha=alpha)
    return Thresholds(
        false_alerts_per_week=f_total,
        interval_s=int(interval_s),
        log_alpha_low=log_a["low_volume_interval"],
        log_alpha_high=log_a["high_volume_interval"],
        log_alpha_zero_run=log_a["zero_counts"],
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


def _check_calibration(f_total: float, *, interval_s: int, level_memory_s: float,
                       level_memory_max_s: float, level_guard_s: float) -> None:
    if not f_total > 0:
        raise ValueError("false_alerts_per_week must be positive")
    if not 0 <= level_guard_s <= level_memory_s <= level_memory_max_s:
        raise ValueError("need 0 <= level_guard_s <= level_memory_s <= level_memory_max_s")
    if not interval_ok(int(interval_s)):
        raise ValueError(f"interval_s must be {INTERVAL_RULE_TEXT}; got {interval_s}")


def _checked_shares(shares: Mapping[str, float] | None) -> dict[str, float]:
    sh = dict(DEFAULT_SHARES if shares is None else shares)
    if set(sh) != set(DEFAULT_SHARES) or abs(sum(sh.values()) - 1.0) > 1e-9:
        raise ValueError(f"shares must give {sorted(DEFAULT_SHARES)} summing to 1")
    return sh


def _family_budgets(f_total: float, sh: Mapping[str, float]) -> dict[str, float]:
    """Expected false alerts per week each test may spend: the family shares, the low and high
    volume families halved between their single-interval test and their CUSUM."""
    return {
        "zero_counts": f_total * sh["zero_counts"],
        "low_volume_interval": 0.5 * f_total * sh["low_volume"],
        "low_volume_cusum": 0.5 * f_total * sh["low_volume"],
        "high_volume_interval": 0.5 * f_total * sh["high_volume"],
        "high_volume_cusum": 0.5 * f_total * sh["high_volume"],
        "repeated_value": f_total * sh["repeated_value"],
        "no_reports": f_total * sh["no_reports"],
    }


def _missing_run(budget: float, n: int, q: float) -> int:
    """Shortest missing run L >= MIN_MISSING_RUN with ``n (1 - q) q^L`` within ``budget``."""
    return max(MIN_MISSING_RUN, math.ceil(
        math.log(budget / (n * (1.0 - q))) / math.log(q) - 1e-12))


def _expected_discrete(mu, alpha, level_var, ia, sig2, log_a, *, min_repeat, scale
                       ) -> dict[str, float]:
    """Expected false alerts per week of the discrete tests at their thresholds, under the
    typical predictive of each bin (``scale`` = intervals per week / bins given)."""
    expected = {}
    c_lo = _critical_low(mu, alpha, log_a["low_volume_interval"])
    p_lo = np.where(c_lo >= 1, np.exp(log_p_lower(np.maximum(c_lo, 0), mu, alpha))
                    - np.exp(log_pmf(0.0, mu, alpha)), 0.0)
    c_hi = _critical_high(mu, alpha, log_a["high_volume_interval"])
    expected["low_volume_interval"] = scale * float(p_lo.sum())
    expected["high_volume_interval"] = scale * float(
        np.exp(log_p_upper(c_hi, mu, alpha)).sum())
    expected["zero_counts"] = scale * _expected_zero_runs(
        mu, alpha, level_var, ia, sig2, log_a["zero_counts"])
    expected["repeated_value"] = scale * _expected_repeats(
        mu, alpha, log_a["repeated_value"], min_repeat)
    return expected


def _move_slack_to_cusums(budget: dict[str, float], expected: dict[str, float]) -> None:
    """Give what the discrete tests leave unspent (less what they overspend) to the two CUSUMs,
    half each, never below a tenth of their own share (updates both mappings)."""
    discrete = ("zero_counts", "low_volume_interval", "high_volume_interval",
                "repeated_value", "no_reports")
    slack = sum(budget[k] - min(expected[k], budget[k]) for k in discrete)
    overspend = sum(max(expected[k] - budget[k], 0.0) for k in discrete)
    for side in ("low_volume_cusum", "high_volume_cusum"):
        budget[side] = max(0.1 * budget[side], budget[side] + 0.5 * (slack - overspend))
        expected[side] = budget[side]
