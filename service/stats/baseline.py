"""Learned time-of-day baselines of detector volume counts, by day type.

Pure numpy/scipy (plus :mod:`zoneinfo` and the ``holidays`` package): no web or database imports.

Model
-----
For each day type (weekday, saturday, sunday_holiday) the count of interval ``b`` on day ``d`` is

    y[d, b] ~ Poisson(g[d] * h[d, b] * mu[b] * e[d, b])

where ``mu[b]`` is the expected volume (vehicles per interval) of local time-of-day bin ``b``,
``e[d, b]`` the number of intervals observed in that bin on that day (0 = missing, 2 for the
repeated hour of a fall-back day), ``g[d]`` a gamma day factor with mean 1 and variance
``day_alpha`` (whole days high or low) and ``h`` an independent gamma interval factor with
variance ``interval_alpha`` (the remaining interval-level excess). ``day_alpha = interval_alpha
= 0`` is the Poisson model.

The steps live in their own modules: local time, day types and holidays in
:mod:`~service.stats.calendar`; the penalised profile fit and the choice of its smoothness (LAML)
in :mod:`~service.stats.smoothing`; the overdispersion tests and estimates in
:mod:`~service.stats.dispersion`; predictive intervals in :mod:`~service.stats.intervals`. This
module holds the robust fit of a day type's days and the fitted :class:`Baseline`.

Robustness
    Fit, then trim and refit (:data:`ROBUST_ROUNDS` rounds, each trim decided afresh from the
    latest fit; the first fit is a quick quadratic-penalty one at a typical lambda, lambda is
    chosen in the second and kept for the final fit). Trimmed are runs of zeros too improbable
    under the model (stuck detector), single intervals with an NB deviance residual beyond
    :data:`TRIM_RESIDUAL` (given the day factor), and whole days whose ratio of observed to
    expected total is far from the median of their day type (more than :data:`DAY_RATIO_MADS`
    robust standard deviations and more than a factor 1.5). Days left with less than
    ``min_completeness`` of their scheduled intervals are dropped. Partial-day inflation (for
    example two hours of chatter at moderate volume) is not always caught: intervals inside
    alerts already raised should be passed as ``exclude``.

Uncertainty
    ``log_se**2 = diag(H^-1)`` (the Bayesian covariance of the penalised fit, Wood 2006) plus
    ``day_alpha / D_eff`` for the overall level, which is an average of ``D_eff`` day factors;
    :func:`~service.stats.intervals.predictive_interval` combines it with both alphas.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import numpy as np
from scipy import special

from service.stats.calendar import (
    DAY_TYPES,
    SECONDS_PER_DAY,
    as_epoch_seconds,
    check_interval_s,
    day_type_table,
    local_time_grid,
    parse_holiday_calendar,
    scheduled_intervals,
    time_zone,
)
from service.stats.dispersion import dispersion_test, negative_binomial_ml, pearson_alpha
from service.stats.smoothing import (
    SMOOTHNESS_DF,
    FitError,
    ProfileFit,
    default_log_penalty,
    fit_profile,
    profile_log_var,
)

__all__ = [
    "Baseline",
    "DayTypeProfile",
    "Expected",
    "FitResult",
    "daily_profile_summary",
    "fit_baseline",
    "own_dispersion",
    "pool_alphas",
    "pool_group_dispersion",
]

OVERDISPERSION_LEVEL = 0.001  # combined p-value below which the profile is negative binomial
TRIM_RESIDUAL = 4.5  # |NB deviance residual| beyond which one interval is trimmed
ZERO_RUN_LOG_P = math.log(1e-6)  # a run of zeros less probable than this is trimmed
DAY_RATIO_MADS = 5.0  # robust standard deviations of log(observed/expected) for a wild day
DAY_RATIO_FLOOR = math.log(1.5)  # ... and never closer than a factor 1.5 to the median
ROBUST_ROUNDS = 2  # trim-and-refit rounds before the final fit
MIN_USABLE_DAYS = 3  # fewer usable days overall -> insufficient_history
NO_LEVEL_LOG_VAR = 0.2**2  # own rule of thumb: level variance of a day type seen on no usable day
# Floor on the day-level variance (day_alpha): a day-to-day coefficient of variation of 5 %.
# Own rule of thumb (no source read): daily volumes of a road vary by more than this from one
# like day to the next (weather, incidents, events), and an estimate of 0 from a few quiet
# days would freeze today's level at the profile's.
LEVEL_VAR_FLOOR = 0.05**2
# Prior strength of the partial pooling of dispersion across day types, in days (day level)
# and in intervals (interval level): a day type's own estimate and the pooled one weigh the
# same when it has this much information of its own. Own choice: weekdays (about 40 days in
# 8 weeks) keep mostly their own value, a weekend type (8 days) moves about halfway.
DAY_ALPHA_PRIOR_DAYS = 10.0
INTERVAL_ALPHA_PRIOR_CELLS = 500.0
# Prior strength, in days of history, of a group's pooled dispersion in the partial pooling
# across the detectors of a group (:func:`pool_group_dispersion`). Own choice: a detector with
# 3 weeks of history moves about a third of the way to the group's value, one with 8 weeks
# about a seventh. Lanes of one site share their day-to-day swings (weather, events, the
# calendar) more than their interval-to-interval excess (platoons, turning traffic), so the
# interval level borrows less.
GROUP_DAY_ALPHA_PRIOR_DAYS = 10.0
GROUP_INTERVAL_ALPHA_PRIOR_DAYS = 3.0
# ---------------------------------------------------------------------------------------------
# Results
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class DayTypeProfile:
    """Fitted expected volumes of one day type.

    Attributes
    ----------
    day_type : str
        One of :data:`DAY_TYPES`.
    fitted_from : str
        The day type itself, or ``"pooled"`` when it had too little history of its own.
    expected : numpy.ndarray, shape (bins_per_day,)
        Expected vehicles per interval in each local time-of-day bin, > 0.
    log_se : numpy.ndarray, shape (bins_per_day,)
        Standard error of ``log(expected)``.
    day_alpha : float
        Variance of the day-level gamma factor (0 = none).
    interval_alpha : float
        NB alpha of the interval-level excess given the day factor (0 = none).
    distribution : str
        ``"poisson"`` or ``"negative_binomial"``.
    dispersion_p_value : float
        Bonferroni-combined p-value of the day- and interval-level overdispersion tests.
    days_used : int
        Days of this day type that entered the fit (for a pooled profile: that set its level).
    smoothing : dict
        What was chosen: penalty, effective df, criterion, robust rounds, pooled days, ...
    """

    day_type: str
    fitted_from: str
    expected: np.ndarray
    log_se: np.ndarray
    day_alpha: float
    interval_alpha: float
    distribution: str
    dispersion_p_value: float
    days_used: int
    smoothing: dict

    def to_dict(self) -> dict:
        """JSON-safe dictionary (lists and floats)."""
        return {
            "day_type": self.day_type,
            "fitted_from": self.fitted_from,
            "expected": [float(v) for v in self.expected],
            "log_se": [float(v) for v in self.log_se],
            "day_alpha": float(self.day_alpha),
            "interval_alpha": float(self.interval_alpha),
            "distribution": self.distribution,
            "dispersion_p_value": float(self.dispersion_p_value),
            "days_used": int(self.days_used),
            "smoothing": _json_safe(self.smoothing),
        }

    @classmethod
    def from_dict(cls, d: dict) -> DayTypeProfile:
        """Inverse of :meth:`to_dict`."""
        return cls(
            day_type=str(d["day_type"]),
            fitted_from=str(d["fitted_from"]),
            expected=np.asarray(d["expected"], dtype=float),
            log_se=np.asarray(d["log_se"], dtype=float),
            day_alpha=float(d["day_alpha"]),
            interval_alpha=float(d["interval_alpha"]),
            distribution=str(d["distribution"]),
            dispersion_p_value=float(d["dispersion_p_value"]),
            days_used=int(d["days_used"]),
            smoothing=dict(d["smoothing"]),
        )


def _json_safe(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe(v) for v in value]
    if isinstance(value, np.ndarray):
        return [_json_safe(v) for v in value.tolist()]
    if isinstance(value, bool | np.bool_):
        return bool(value)
    if isinstance(value, int | np.integer):
        return int(value)
    if isinstance(value, float | np.floating):
        v = float(value)
        return v if math.isfinite(v) else None
    return value


class Expected(NamedTuple):
    """What a baseline expects of intervals (:meth:`Baseline.expected_for`), broadcast arrays.

    Attributes
    ----------
    mu : numpy.ndarray
        Expected vehicles per interval.
    log_se : numpy.ndarray
        Standard error of ``log(mu)``.
    day_alpha : numpy.ndarray
        Variance of the day-level gamma factor (0 = none).
    interval_alpha : numpy.ndarray
        NB alpha of the interval-level excess (0 = none).
    """

    mu: np.ndarray
    log_se: np.ndarray
    day_alpha: np.ndarray
    interval_alpha: np.ndarray


@dataclass(frozen=True, eq=False)
class Baseline:
    """Expected volumes of one detector by day type and local time-of-day bin.

    Attributes
    ----------
    interval_s : int
        Interval length, seconds.
    bins_per_day : int
        ``86400 // interval_s``.
    profiles : dict[str, DayTypeProfile]
        One profile per entry of :data:`DAY_TYPES`, always all three.
    window_start_s, window_end_s : int
        Fitted window ``[start, end)``, epoch seconds.
    intervals_used : int
        Observed intervals that entered the final fits.
    intervals_trimmed : int
        Observed intervals on usable days removed by the robust fit (including trimmed days).
    days_dropped : int
        Local days in the window dropped for completeness below ``min_completeness``.
    days_trimmed : int
        Usable days removed by the robust fit as wildly off.
    timezone : str or None
        IANA time zone the bins are in.
    holiday_calendar : str or None
        Holiday calendar used for sunday_holiday.
    """

    interval_s: int
    bins_per_day: int
    profiles: dict[str, DayTypeProfile]
    window_start_s: int
    window_end_s: int
    intervals_used: int
    intervals_trimmed: int
    days_dropped: int
    days_trimmed: int = 0
    timezone: str | None = None
    holiday_calendar: str | None = None
    _table: tuple = field(default=(), init=False, repr=False)

    def __post_init__(self) -> None:
        missing = [t for t in DAY_TYPES if t not in self.profiles]
        if missing:
            raise ValueError(f"baseline lacks profiles for {missing}")
        stacked = tuple(
            np.stack([np.asarray(getattr(self.profiles[t], name), dtype=float) for t in DAY_TYPES])
            for name in ("expected", "log_se")
        )
        alphas = tuple(
            np.array([float(getattr(self.profiles[t], name)) for t in DAY_TYPES])
            for name in ("day_alpha", "interval_alpha")
        )
        object.__setattr__(self, "_table", stacked + alphas)

    def expected_for(self, day_type: Any, bin: Any) -> Expected:
        """Expected volume and its uncertainty for day-type codes and bins (vectorised).

        Parameters
        ----------
        day_type : array_like of int
            Day-type codes (indexes into :data:`DAY_TYPES`).
        bin : array_like of int
            Local time-of-day bins.

        Returns
        -------
        Expected
            ``(mu, log_se, day_alpha, interval_alpha)``: expected vehicles per interval, SE of
            its log, and the two NB alphas, broadcast (a named tuple: unpacks as before).
        """
        code = np.asarray(day_type, dtype=np.intp)
        b = np.asarray(bin, dtype=np.intp)
        expected, log_se, day_alpha, interval_alpha = self._table
        zero = np.zeros(np.broadcast(code, b).shape)
        return Expected(mu=expected[code, b], log_se=log_se[code, b],
                        day_alpha=day_alpha[code] + zero, interval_alpha=interval_alpha[code] + zero)

    def to_dict(self) -> dict:
        """JSON-safe dictionary (lists, floats, ints, strings)."""
        return {
            "format": 1,
            "interval_s": int(self.interval_s),
            "bins_per_day": int(self.bins_per_day),
            "profiles": {t: self.profiles[t].to_dict() for t in DAY_TYPES},
            "window_start_s": int(self.window_start_s),
            "window_end_s": int(self.window_end_s),
            "intervals_used": int(self.intervals_used),
            "intervals_trimmed": int(self.intervals_trimmed),
            "days_dropped": int(self.days_dropped),
            "days_trimmed": int(self.days_trimmed),
            "timezone": self.timezone,
            "holiday_calendar": self.holiday_calendar,
        }

    @classmethod
    def from_dict(cls, d: dict) -> Baseline:
        """Inverse of :meth:`to_dict`."""
        if int(d.get("format", 1)) != 1:
            raise ValueError(f"unsupported baseline format {d.get('format')!r}")
        return cls(
            interval_s=int(d["interval_s"]),
            bins_per_day=int(d["bins_per_day"]),
            profiles={t: DayTypeProfile.from_dict(d["profiles"][t]) for t in DAY_TYPES},
            window_start_s=int(d["window_start_s"]),
            window_end_s=int(d["window_end_s"]),
            intervals_used=int(d["intervals_used"]),
            intervals_trimmed=int(d["intervals_trimmed"]),
            days_dropped=int(d["days_dropped"]),
            days_trimmed=int(d.get("days_trimmed", 0)),
            timezone=d.get("timezone"),
            holiday_calendar=d.get("holiday_calendar"),
        )


@dataclass(frozen=True)
class FitResult:
    """Outcome of :func:`fit_baseline`.

    Attributes
    ----------
    status : str
        ``"fitted"``, ``"insufficient_history"`` or ``"failed"``.
    reason : str or None
        Why it was not fitted (None when fitted).
    baseline : Baseline or None
        The fitted baseline (None unless fitted).
    """

    status: str
    reason: str | None
    baseline: Baseline | None


# ---------------------------------------------------------------------------------------------
# Robust fit of one group of days
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class _GroupFit:
    beta: np.ndarray
    log_var: np.ndarray  # diag(H^-1)
    day_alpha: float
    interval_alpha: float
    distribution: str
    p_value: float
    p_day: float
    p_interval: float
    day_keep: np.ndarray  # (D,) bool, days that entered the final fit
    cell_keep: np.ndarray  # (D, n) bool, observed cells that entered the final fit
    d_eff: float
    smoothing: dict
    hour_alpha: float = 0.0  # relative variance of hourly totals beyond interval_alpha
    day_info: float = 0.0  # effective days of information about day_alpha
    interval_info: float = 0.0  # effective intervals of information about interval_alpha


def _zero_run_flags(Y, X, m, alpha):
    """Cells in runs of zeros (within a day, over observed cells) too improbable under the model."""
    D, n = Y.shape
    obs = X.ravel() > 0
    flat = np.flatnonzero(obs)
    if flat.size == 0:
        return np.zeros((D, n), dtype=bool)
    zero = Y.ravel()[flat] == 0
    day = flat // n
    new_run = np.ones(flat.size, dtype=bool)
    new_run[1:] = (zero[1:] != zero[:-1]) | (day[1:] != day[:-1])
    run_id = np.cumsum(new_run) - 1
    run_sum = np.bincount(run_id, weights=m.ravel()[flat])
    run_zero = zero[new_run]
    if alpha > 0:
        log_p = -np.log1p(alpha * run_sum) / alpha  # gamma-mixed Poisson probability of all zeros
    else:
        log_p = -run_sum
    bad_run = run_zero & (log_p < ZERO_RUN_LOG_P)
    flags = np.zeros(D * n, dtype=bool)
    flags[flat] = bad_run[run_id]
    return flags.reshape(D, n)


def _nb_deviance_residual(y, m, alpha_per_cell):
    with np.errstate(divide="ignore", invalid="ignore"):
        term = special.xlogy(y, y / m)
        a = np.maximum(alpha_per_cell, 1e-12)
        nb = 2.0 * (term - (y + 1.0 / a) * (np.log1p(a * y) - np.log1p(a * m)))
        pois = 2.0 * (term - (y - m))
        dev = np.where(alpha_per_cell > 1e-12, nb, pois)
    return np.sign(y - m) * np.sqrt(np.maximum(dev, 0.0))


def _day_factors(Y, X, mu, keep):
    M = (X * keep) @ mu
    tot = (Y * keep).sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        g = np.where(M > 0, tot / M, 1.0)
    return g, tot, M


def _fit_round(totals, exposures, inv_phi, *, round_, nu, rho, beta):
    """The profile fit of one robust round; returns it and the prior df in force after it.

    A rough fit at a typical lambda is enough to steer the first trimming; lambda is then
    chosen on trimmed data with interval-level weights, and kept for the final fit. Round 0 is
    quadratic: convex, a few Newton steps from any start. Should the Student-t fit fail, the
    quadratic penalty (convex: it always fits) takes over for this and every later round.
    """
    if round_ == 0:
        search = {"log_penalty": default_log_penalty(totals, inv_phi)}
    elif round_ == 1:
        search = {"guess": rho}
    else:
        search = {"log_penalty": rho}
    try:
        prof = fit_profile(totals, exposures, inv_phi, nu=nu if round_ else None, start=beta,
                           **search)
    except FitError:
        if nu is None:
            raise
        nu = None
        prof = fit_profile(totals, exposures, inv_phi, nu=None, start=None)
    return prof, nu


@dataclass(frozen=True, eq=False)
class _RoundDispersion:
    """Dispersion estimates of one robust round, on the days and cells of its fit."""

    rows: np.ndarray  # (D,) bool, kept days with a positive expectation
    sel: np.ndarray  # (D, n) bool, cells of those days that enter the estimates
    day_exp: np.ndarray  # (D,) expected vehicles of each day over its kept cells
    y_cells: np.ndarray  # counts of the selected cells
    m_cells: np.ndarray  # their expectations (with the day's raw factor)
    y_day: np.ndarray  # daily totals of the rows, rescaled by the interval-level inflation
    m_day: np.ndarray  # and their expectations, rescaled alike
    level: float
    interval_alpha: float
    day_alpha: float


def _round_dispersion(Y, X, mu, keep, day_keep, *, edf, final) -> _RoundDispersion:
    """Interval-level alpha (Pearson), then day-level alpha on rescaled daily totals: NB
    maximum likelihood in the final round, moments (enough to steer trimming) before."""
    g_raw, day_tot, day_exp = _day_factors(Y, X, mu, keep)
    rows = day_keep & (day_exp > 0)
    m_cell = g_raw[:, None] * mu[None, :] * X
    sel = keep & rows[:, None] & (m_cell > 0)
    n_cells = int(sel.sum())
    y_c, m_c, e_c = Y[sel], m_cell[sel], X[sel]
    alpha_int = pearson_alpha(y_c, m_c, exposure=e_c, dof=n_cells - int(rows.sum()) - edf)
    s2 = ((X * keep) * mu[None, :] ** 2).sum(axis=1)
    inflation = 1.0 + alpha_int * s2[rows] / day_exp[rows]
    y_day, m_day = day_tot[rows] / inflation, day_exp[rows] / inflation
    if rows.sum() < 2:
        level, alpha_day = 1.0, 0.0
    elif final:
        level, alpha_day = negative_binomial_ml(y_day, m_day)
    else:
        level = float(y_day.sum() / m_day.sum())
        excess = np.sum((y_day - level * m_day) ** 2 - y_day) / np.sum((level * m_day) ** 2)
        alpha_day = max(0.0, float(excess) * rows.sum() / (rows.sum() - 1.0))
    return _RoundDispersion(rows=rows, sel=sel, day_exp=day_exp, y_cells=y_c, m_cells=m_c,
                            y_day=y_day, m_day=m_day, level=level, interval_alpha=alpha_int,
                            day_alpha=alpha_day)


def _trim(Y, X, mu, disp: _RoundDispersion, groups, scheduled, *, min_completeness):
    """Trim afresh from a round's fit: zero runs, extreme intervals, wild or depleted days.

    Returns the cells and days kept, and each day's total and expectation over its kept cells.
    """
    observed = X > 0
    flags = _zero_run_flags(Y, X, mu[None, :] * X, disp.day_alpha + disp.interval_alpha)
    ok = observed & ~flags
    g_raw, _, _ = _day_factors(Y, X, mu, ok)
    m_cell = g_raw[:, None] * mu[None, :] * X
    resid = _nb_deviance_residual(Y, np.maximum(m_cell, 1e-300),
                                  disp.interval_alpha / np.maximum(X, 1.0))
    flags |= observed & (np.abs(resid) > TRIM_RESIDUAL)
    cell_keep = observed & ~flags
    g_raw, day_tot, day_exp = _day_factors(Y, X, mu, cell_keep)
    with np.errstate(divide="ignore"):
        ratio = np.log((day_tot + 0.5) / (day_exp + 0.5))
    retained = (X * cell_keep).sum(axis=1)  # intervals, not cells (fall-back cells hold 2)
    day_keep = (retained >= min_completeness * scheduled) & (day_exp > 0)
    day_keep &= ~_wild_days(ratio, groups, day_keep)
    if day_keep.sum() == 0:
        raise FitError("every day was trimmed")
    return cell_keep, day_keep, day_tot, day_exp


def _shrunk_day_factors(day_tot, day_exp, weights, day_keep, day_alpha):
    """Empirical-Bayes day factors for the next fit's exposures, mean 1 over kept days."""
    shrink = 1.0 / day_alpha if day_alpha > 0 else np.inf
    g_fit = np.ones(day_tot.size)
    if np.isfinite(shrink):
        g_fit = (day_tot + shrink) / (day_exp + shrink)
        g_fit /= np.sum(weights[day_keep] * g_fit[day_keep]) / np.sum(weights[day_keep])
    return g_fit


def _overdispersion_tests(prof: ProfileFit, log_var, mu, X, keep, wg, exposures,
                          disp: _RoundDispersion):
    """Tests of the final fit: interval level by Dean's score test with leverages, day level by
    the Pearson chi-square of the rescaled daily totals. Returns (interval test, day test)."""
    W = prof.info
    with np.errstate(divide="ignore", invalid="ignore"):
        share = np.where(exposures[None, :] > 0, wg / exposures[None, :], 0.0)
        lev_bin = (W * log_var)[None, :] * share
        lev_day = np.where(disp.day_exp[:, None] > 0, (mu[None, :] * X) / disp.day_exp[:, None],
                           0.0)
    lev = (lev_bin + lev_day)[disp.sel]
    test_int = dispersion_test(disp.y_cells, disp.m_cells, leverage=lev)
    base_var = disp.level * disp.m_day
    lev_d = disp.m_day / disp.m_day.sum()
    test_day = dispersion_test(disp.y_day, base_var, base_variance=base_var, leverage=lev_d,
                               method="pearson")
    return test_int, test_day


def _fit_group(Y, X, weights, groups, scheduled, *, min_completeness, start=None):
    """Robust fit of one set of days: fit -> trim -> refit. Raises FitError on failure."""
    D, n = Y.shape
    observed = X > 0
    cell_keep = observed.copy()
    day_keep = np.ones(D, dtype=bool)
    g_fit = np.ones(D)
    inv_phi = np.ones(n)
    edf = n / 4.0
    beta = start
    rho = 0.0
    nu: float | None = SMOOTHNESS_DF
    for round_ in range(ROBUST_ROUNDS + 1):
        keep = cell_keep & day_keep[:, None]
        Xk = X * keep
        totals = weights @ (Y * keep)
        exposures = (weights * g_fit) @ Xk
        final = round_ == ROBUST_ROUNDS
        prof, nu = _fit_round(totals, exposures, inv_phi, round_=round_, nu=nu, rho=rho,
                              beta=beta)
        beta, mu, rho = prof.beta, np.exp(prof.beta), prof.log_penalty
        if final:
            log_var = profile_log_var(prof)
            edf = float(np.dot(prof.info, log_var))
        disp = _round_dispersion(Y, X, mu, keep, day_keep, edf=edf, final=final)
        if final:
            break
        cell_keep, day_keep, day_tot, day_exp = _trim(Y, X, mu, disp, groups, scheduled,
                                                      min_completeness=min_completeness)
        g_fit = _shrunk_day_factors(day_tot, day_exp, weights, day_keep, disp.day_alpha)
        inv_phi = 1.0 / (1.0 + disp.interval_alpha * mu)

    wg = (weights * g_fit)[:, None] * (X * keep)
    test_int, test_day = _overdispersion_tests(prof, log_var, mu, X, keep, wg, exposures, disp)
    fit = _group_result(prof, beta, log_var, edf, nu, disp, test_int, test_day, weights)
    hour_alpha = _hour_excess(Y, X, mu, disp)
    smoothing = dict(fit.smoothing, hour_alpha=hour_alpha)
    return dataclasses.replace(fit, hour_alpha=hour_alpha, smoothing=smoothing)


def _hour_excess(Y, X, mu, disp: _RoundDispersion) -> float:
    """Relative variance of hourly totals given the day's level, beyond the interval-level
    excess: hour-to-hour swings shared by the intervals of an hour (moment estimate, NB2 form
    ``sum((y - m)^2 - m) / sum(m^2)`` over day-hours, less ``interval_alpha / k`` for the
    ``k`` intervals of an hour). The profile is an average over days of exactly these swings,
    so its error is this over the effective number of days; the Hessian of the fit, which
    takes intervals as independent, does not see it."""
    D, n = Y.shape
    if n % 24 or not disp.rows.any():
        return 0.0
    k = n // 24
    rows = disp.rows
    keep = disp.sel[rows]
    y = (Y[rows] * keep).reshape(-1, 24, k).sum(axis=2)
    g = np.where(disp.day_exp[rows] > 0, (Y[rows] * keep).sum(axis=1)
                 / np.maximum(disp.day_exp[rows], 1e-300), 1.0)
    m = ((mu[None, :] * X[rows] * keep).reshape(-1, 24, k).sum(axis=2)) * g[:, None]
    m2 = float(np.sum(m * m))
    if m2 <= 0:
        return 0.0
    # degrees of freedom: one day factor per day is fitted from the same 24 hours
    alpha_hour = float(np.sum((y - m) ** 2 - m)) / m2 * 24.0 / 23.0
    return max(0.0, alpha_hour - disp.interval_alpha / k)


def _group_result(prof: ProfileFit, beta, log_var, edf, nu, disp: _RoundDispersion,
                  test_int, test_day, weights) -> _GroupFit:
    """The group's fit with its own dispersion estimates (never set to 0 by a pre-test: the
    tests only label the distribution) and the information each estimate carries."""
    alpha_day, alpha_int = disp.day_alpha, disp.interval_alpha
    p_value = min(1.0, 2.0 * min(test_int.p_value, test_day.p_value))
    distribution = "negative_binomial" if p_value < OVERDISPERSION_LEVEL else "poisson"
    w_kept = weights[disp.rows]
    d_eff = float(w_kept.sum() ** 2 / np.sum(w_kept**2))
    day_mean = float(np.mean(disp.m_day)) * disp.level if disp.m_day.size else 0.0
    cell_mean = float(np.mean(disp.m_cells)) if disp.m_cells.size else 0.0
    smoothing = {
        "method": "per-bin log rates, cyclic second-difference Student-t prior",
        "prior_df": nu,
        "criterion": "LAML",
        "penalty": math.exp(prof.log_penalty),
        "log_penalty": prof.log_penalty,
        "effective_df": edf,
        "laml": prof.laml,
        "robust_rounds": ROBUST_ROUNDS,
        "p_value_day": test_day.p_value,
        "p_value_interval": test_int.p_value,
        "day_alpha_estimate": alpha_day,
        "interval_alpha_estimate": alpha_int,
        "effective_days": d_eff,
        "mean_day_expected": day_mean,
        "mean_interval_expected": cell_mean,
    }
    return _GroupFit(
        beta=beta,
        log_var=log_var,
        day_alpha=alpha_day,
        interval_alpha=alpha_int,
        distribution=distribution,
        p_value=p_value,
        p_day=test_day.p_value,
        p_interval=test_int.p_value,
        day_keep=disp.rows,
        cell_keep=disp.sel,
        d_eff=d_eff,
        smoothing=smoothing,
        day_info=max(d_eff - 1.0, 0.0),
        interval_info=float(disp.y_cells.size),
    )


def _information(dof: float, pooled: float, mean_count: float) -> float:
    """Effective degrees of freedom of an NB2 alpha estimate from ``dof`` counts of mean
    ``mean_count``: Var(alpha_hat) is about ``2 (alpha + 1/mean)^2 / dof`` (the squared
    coefficient of variation of a count's excess), so in units of a noise-free estimate's
    ``2 alpha^2 / dof`` the count noise ``1/mean`` discounts the information."""
    if dof <= 0 or mean_count <= 0:
        return 0.0
    ratio = pooled / (pooled + 1.0 / mean_count) if pooled > 0 else 0.0
    return dof * ratio * ratio


def pool_alphas(estimates, dofs, means, *, prior_dof: float, floor: float = 0.0
                ) -> tuple[float, list[float]]:
    """Partial pooling of NB2 alpha estimates (empirical Bayes, information-weighted).

    The pooled value is the mean of the estimates weighted by their information
    (:func:`_information`); each estimate then moves toward it as the posterior mean under a
    scaled inverse chi-square prior of ``prior_dof`` degrees of freedom centered on it
    (Gelman et al., *Bayesian Data Analysis*, 3rd ed., sec. 3.3: the posterior scale is the
    dof-weighted mean of prior and sample scales), and the result is inflated by
    ``nu / (nu - 2)``, ``nu`` the posterior dof: the variance of the Student-t predictive
    that an uncertain variance gives (BDA sec. 3.2), so a short history carries its
    parameter uncertainty into the predictive distribution.

    Parameters
    ----------
    estimates : sequence of float
        Alpha estimates (>= 0).
    dofs : sequence of float
        Degrees of freedom of each (days - 1 for day level, intervals for interval level).
    means : sequence of float
        Mean count each estimate was made from (vehicles per day or per interval).
    prior_dof : float
        Strength of the pooled value as a prior, in the same units as ``dofs``.
    floor : float
        Lower bound of every result (and of the pooled value).

    Returns
    -------
    pooled : float
    shrunk : list of float
        Each estimate's posterior value, in order.
    """
    est = [max(float(e), 0.0) for e in estimates]
    if not est:
        return floor, []
    raw = [float(d) for d in dofs]
    total = sum(raw)
    pooled = sum(e * d for e, d in zip(est, raw, strict=True)) / total if total > 0 else 0.0
    for _ in range(2):  # weights depend on the pooled value through the count noise
        info = [_information(d, pooled, m) for d, m in zip(raw, means, strict=True)]
        if sum(info) > 0:
            pooled = sum(e * w for e, w in zip(est, info, strict=True)) / sum(info)
    pooled = max(pooled, floor)
    info = [_information(d, pooled, m) for d, m in zip(raw, means, strict=True)]
    shrunk = []
    for e, w in zip(est, info, strict=True):
        nu = w + prior_dof
        value = (w * e + prior_dof * pooled) / nu
        shrunk.append(max(value * nu / max(nu - 2.0, 1.0), floor))
    return pooled, shrunk


def pool_group_dispersion(baselines, *, day_prior_days: float = GROUP_DAY_ALPHA_PRIOR_DAYS,
                          interval_prior_days: float = GROUP_INTERVAL_ALPHA_PRIOR_DAYS
                          ) -> list[Baseline]:
    """Partial pooling of dispersion across the detectors of one group (empirical Bayes).

    For each day type, the group's value is the mean of its detectors' ``day_alpha`` (and
    ``interval_alpha``) weighted by each detector's days of history (``days_used`` summed over
    its day types: a day type's value already borrows from the detector's other day types,
    :func:`pool_alphas`); each detector's value then moves toward it as a posterior mean with
    the group's value as a prior worth ``day_prior_days`` (``interval_prior_days``) days:
    ``(n a + k g) / (n + k)``, ``n`` the detector's days. More days, less shrinkage. This is
    the shrinkage of Efron & Morris (1975, *JASA* 70: "Data analysis using Stein's estimator
    and its generalizations"; from memory) with a fixed prior strength instead of one estimated
    from the spread between detectors: groups are small (three or four lanes), too few to
    estimate that spread. The values pooled are the detectors' own (already pooled across their
    day types by :func:`pool_alphas`, and inflated for a short history); the day level keeps
    the floor :data:`LEVEL_VAR_FLOOR`. An own profile's ``log_se`` keeps its day-level term
    ``day_alpha / effective_days`` in step. Baselines of a different interval length are not
    comparable and are returned unchanged, as is a group of one.

    Parameters
    ----------
    baselines : sequence of Baseline
        The group's detectors fitted together, on the same interval length.
    day_prior_days, interval_prior_days : float
        Prior strength of the group's value, in days of history.

    Returns
    -------
    list of Baseline
        In order; each profile's ``smoothing`` records ``group_day_alpha``,
        ``group_interval_alpha`` and the values before (``day_alpha_own``,
        ``interval_alpha_own``).
    """
    out = list(baselines)
    if len(out) < 2 or len({b.interval_s for b in out}) != 1:
        return out
    new_profiles: list[dict[str, DayTypeProfile]] = [dict(b.profiles) for b in out]
    days = np.array([float(sum(max(p.days_used, 0) for p in b.profiles.values()))
                     for b in out])
    for name in DAY_TYPES:
        profs = [b.profiles[name] for b in out]
        day = np.array([float(p.day_alpha) for p in profs])
        inter = np.array([float(p.interval_alpha) for p in profs])
        wts = days if days.sum() > 0 else np.ones(days.size)
        g_day = max(float(np.sum(wts * day) / np.sum(wts)), LEVEL_VAR_FLOOR)
        g_int = float(np.sum(wts * inter) / np.sum(wts))
        day_new = np.maximum((days * day + day_prior_days * g_day) / (days + day_prior_days),
                             LEVEL_VAR_FLOOR)
        int_new = (days * inter + interval_prior_days * g_int) / (days + interval_prior_days)
        for k, p in enumerate(profs):
            log_se = p.log_se
            d_eff = float(p.smoothing.get("effective_days") or 0.0)
            if p.fitted_from == p.day_type and d_eff > 0:
                log_var = p.log_se**2 + (float(day_new[k]) - p.day_alpha) / d_eff
                log_se = np.sqrt(np.maximum(log_var, 0.0))
            smoothing = dict(p.smoothing, group_day_alpha=g_day, group_interval_alpha=g_int,
                             day_alpha_own=p.day_alpha, interval_alpha_own=p.interval_alpha)
            new_profiles[k][name] = dataclasses.replace(
                p, day_alpha=float(day_new[k]), interval_alpha=float(int_new[k]),
                log_se=log_se, smoothing=_json_safe(smoothing))
    return [dataclasses.replace(b, profiles=prof) for b, prof in zip(out, new_profiles,
                                                                     strict=True)]


def own_dispersion(baseline: Baseline) -> Baseline:
    """The baseline with each profile's dispersion as it was before
    :func:`pool_group_dispersion` (unchanged if it never was pooled across a group): what a
    stored group mate contributes when one detector of the group is refitted alone."""
    profiles = {}
    for name, p in baseline.profiles.items():
        if "day_alpha_own" not in p.smoothing:
            return baseline
        profiles[name] = dataclasses.replace(
            p, day_alpha=float(p.smoothing["day_alpha_own"]),
            interval_alpha=float(p.smoothing["interval_alpha_own"]))
    return dataclasses.replace(baseline, profiles=profiles)


def _wild_days(ratio, groups, candidates):
    """Days whose log(observed/expected) is far from the median of their day type."""
    wild = np.zeros(ratio.size, dtype=bool)
    if candidates.sum() == 0:
        return wild
    overall = float(np.median(ratio[candidates]))
    for code in np.unique(groups):
        members = candidates & (groups == code)
        if members.sum() >= 3:
            center = float(np.median(ratio[members]))
            spread = 1.4826 * float(np.median(np.abs(ratio[members] - center)))
            floor = DAY_RATIO_FLOOR
        else:  # too few days of this type to judge them among themselves
            center = overall
            spread = 1.4826 * float(np.median(np.abs(ratio[candidates] - overall)))
            floor = math.log(2.5)
        threshold = max(DAY_RATIO_MADS * spread, floor)
        wild |= (groups == code) & (np.abs(ratio - center) > threshold)
    return wild


# ---------------------------------------------------------------------------------------------
# fit_baseline
# ---------------------------------------------------------------------------------------------


def _check_fit_arguments(start_s, counts, exclude, *, as_of_s, window_days, half_life_days,
                         min_completeness, min_days_per_type):
    t = as_epoch_seconds(start_s)
    y = np.asarray(counts)
    if y.ndim != 1:
        y = y.reshape(-1)
    if y.shape != t.shape:
        raise ValueError(f"start_s and counts differ in length ({t.size} vs {y.size})")
    if y.size and (y.dtype.kind not in "iuf" or not np.all(np.isfinite(y)) or np.any(y < 0)
                   or np.any(y != np.round(y))):
        raise ValueError("counts must be non-negative whole numbers of vehicles")
    y = y.astype(float)
    if exclude is None:
        ex = np.zeros(t.size, dtype=bool)
    else:
        ex = np.asarray(exclude, dtype=bool).reshape(-1)
        if ex.shape != t.shape:
            raise ValueError("exclude must be a boolean mask as long as start_s")
    if not isinstance(as_of_s, int | np.integer) or isinstance(as_of_s, bool):
        raise ValueError("as_of_s must be integer epoch seconds")
    if not window_days > 0:
        raise ValueError("window_days must be positive")
    if half_life_days is not None and not half_life_days > 0:
        raise ValueError("half_life_days must be positive (or None for equal weights)")
    if not 0.0 < min_completeness <= 1.0:
        raise ValueError("min_completeness must be in (0, 1]")
    if int(min_days_per_type) < 1:
        raise ValueError("min_days_per_type must be at least 1")
    return t, y, ex


@dataclass(frozen=True, eq=False)
class _WindowDays:
    """The local days of a fitting window, from the scheduled and the observed intervals."""

    day0: int  # first local day (days since 1970-01-01)
    scheduled_per_day: np.ndarray  # (span,) intervals scheduled on each day
    center_sum_s: np.ndarray  # (span,) sum of their starts (for each day's age)
    observed_day: np.ndarray  # (T,) position of each observed interval's day in 0..span-1
    observed_bin: np.ndarray  # (T,) its local time-of-day bin
    day_types: np.ndarray  # (span,) day-type code of each day
    usable: np.ndarray  # (span,) bool, in the window and complete enough
    days_dropped: int  # days in the window dropped for completeness


def _window_days(t, *, window, interval_s, timezone, holiday_calendar, calendar,
                 min_completeness) -> _WindowDays:
    """Local days of the window with their schedule, day type and completeness."""
    window_start, window_end = window
    phase = int(np.bincount((t % interval_s).astype(np.intp)).argmax())
    sched = scheduled_intervals(window_start, window_end, interval_s=interval_s, phase_s=phase)
    grid_s = local_time_grid(sched, interval_s=interval_s, timezone=timezone,
                             holiday_calendar=holiday_calendar)
    grid_o = local_time_grid(t, interval_s=interval_s, timezone=timezone,
                             holiday_calendar=holiday_calendar)
    day0 = int(min(grid_s.local_day.min(), grid_o.local_day.min()))
    span = int(max(grid_s.local_day.max(), grid_o.local_day.max())) - day0 + 1
    sched_idx = grid_s.local_day.astype(np.intp) - day0
    scheduled_per_day = np.bincount(sched_idx, minlength=span)
    center = np.bincount(sched_idx, weights=sched.astype(float), minlength=span)
    obs_idx = grid_o.local_day.astype(np.intp) - day0
    observed_per_day = np.bincount(obs_idx, minlength=span)
    in_window = scheduled_per_day > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        completeness = np.where(in_window, observed_per_day / np.maximum(scheduled_per_day, 1), 0.0)
    usable = in_window & (completeness >= min_completeness)
    return _WindowDays(
        day0=day0,
        scheduled_per_day=scheduled_per_day,
        center_sum_s=center,
        observed_day=obs_idx,
        observed_bin=grid_o.bin,
        day_types=day_type_table(day0, day0 + span - 1, calendar),
        usable=usable,
        days_dropped=int(np.sum(in_window & ~usable)),
    )


@dataclass(frozen=True, eq=False)
class _DayMatrices:
    """Counts and exposures of the usable days, one row per day and one column per bin."""

    Y: np.ndarray  # (D, n) vehicles
    X: np.ndarray  # (D, n) intervals observed (2 in a fall-back day's repeated hour)
    types: np.ndarray  # (D,) day-type codes
    scheduled: np.ndarray  # (D,) intervals scheduled
    weights: np.ndarray  # (D,) forgetting weights


def _day_matrices(days: _WindowDays, y, *, bins_per_day, window_end, half_life_days
                  ) -> _DayMatrices:
    """Day-by-bin matrices of the usable days, with their forgetting weights."""
    span = days.usable.size
    day_ids = np.flatnonzero(days.usable)  # positions in 0..span-1
    row_of = np.full(span, -1, dtype=np.intp)
    row_of[day_ids] = np.arange(day_ids.size)
    rows = row_of[days.observed_day]
    keep_obs = rows >= 0
    cell = rows[keep_obs] * bins_per_day + days.observed_bin[keep_obs]
    size = day_ids.size * bins_per_day
    Y = np.bincount(cell, weights=y[keep_obs], minlength=size).reshape(day_ids.size, bins_per_day)
    X = np.bincount(cell, minlength=size).astype(float).reshape(day_ids.size, bins_per_day)
    if half_life_days is None:
        weights = np.ones(day_ids.size)
    else:
        age_s = window_end - days.center_sum_s[day_ids] / days.scheduled_per_day[day_ids]
        weights = 0.5 ** (age_s / (half_life_days * SECONDS_PER_DAY))
    return _DayMatrices(Y=Y, X=X, types=days.day_types[day_ids],
                        scheduled=days.scheduled_per_day[day_ids].astype(float), weights=weights)


def fit_baseline(
    start_s: Any,
    counts: Any,
    *,
    interval_s: int,
    timezone: str,
    holiday_calendar: str | None = None,
    as_of_s: int,
    window_days: float = 56,
    half_life_days: float | None = None,
    min_completeness: float = 0.8,
    exclude: Any = None,
    min_days_per_type: int = 3,
) -> FitResult:
    """Fit a detector's expected volume by day type and local time of day.

    Parameters
    ----------
    start_s : array_like of int
        Starts of the observed intervals, epoch seconds (UTC). Missing intervals are absent
        (missing is never zero). Duplicated starts keep their first count.
    counts : array_like of int
        Vehicles counted in each interval.
    interval_s : int
        Interval length, seconds (must divide 3600).
    timezone : str
        IANA time zone of the detector.
    holiday_calendar : str, optional
        ``"US"`` / ``"US-CO"`` style; holidays are sunday_holiday.
    as_of_s : int
        End of the window, epoch seconds; the window is ``[as_of_s - window_days, as_of_s)``.
    window_days : float
        Window length, days.
    half_life_days : float, optional
        Exponential forgetting: a day's weight halves every ``half_life_days`` of age (weights on
        totals and exposures). None = equal weights.
    min_completeness : float
        Local days with fewer than this share of their scheduled intervals (inside the window,
        after ``exclude``) are dropped.
    exclude : array_like of bool, optional
        Intervals to leave out (for example inside alerts already raised).
    min_days_per_type : int
        A day type with fewer usable days takes the pooled profile (``fitted_from="pooled"``),
        scaled to its own level when it has at least one day.

    Returns
    -------
    FitResult
        ``status="fitted"`` with a :class:`Baseline`; ``"insufficient_history"`` when fewer than
        ``max(3, min_days_per_type)`` usable days; ``"failed"`` on numerical failure or when no
        vehicle was counted.

    Raises
    ------
    ValueError
        Bad arguments, unknown time zone or holiday calendar.
    """
    interval_s = check_interval_s(interval_s)
    time_zone(timezone)
    calendar = parse_holiday_calendar(holiday_calendar)
    t, y, ex = _check_fit_arguments(
        start_s, counts, exclude, as_of_s=as_of_s, window_days=window_days,
        half_life_days=half_life_days, min_completeness=min_completeness,
        min_days_per_type=min_days_per_type,
    )
    min_days_per_type = int(min_days_per_type)
    window_end = int(as_of_s)
    window_start = window_end - int(round(window_days * SECONDS_PER_DAY))
    bins_per_day = SECONDS_PER_DAY // interval_s
    need_days = max(MIN_USABLE_DAYS, min_days_per_type)

    sel = (t >= window_start) & (t < window_end) & ~ex
    t, y = t[sel], y[sel]
    if t.size == 0:
        return _insufficient(
            f"no observed intervals in the window (need at least {need_days} usable days)"
        )
    t, first = np.unique(t, return_index=True)
    y = y[first]
    days = _window_days(t, window=(window_start, window_end), interval_s=interval_s,
                        timezone=timezone, holiday_calendar=holiday_calendar, calendar=calendar,
                        min_completeness=min_completeness)
    n_usable = int(days.usable.sum())
    if n_usable < need_days:
        return _insufficient(
            f"{n_usable} usable days in the window (need at least {need_days} with "
            f"completeness >= {min_completeness:g})"
        )
    m = _day_matrices(days, y, bins_per_day=bins_per_day, window_end=window_end,
                      half_life_days=half_life_days)
    if m.Y.sum() <= 0:
        return FitResult(status="failed", baseline=None, reason=(
            "no vehicles counted on any usable day in the window "
            "(a dead detector has no baseline)"))
    try:
        return _assemble(m, interval_s=interval_s, bins_per_day=bins_per_day,
                         min_days_per_type=min_days_per_type, min_completeness=min_completeness,
                         window=(window_start, window_end), days_dropped=days.days_dropped,
                         timezone=timezone, holiday_calendar=holiday_calendar,
                         need_days=need_days)
    except (FitError, np.linalg.LinAlgError, FloatingPointError, ZeroDivisionError) as exc:
        return FitResult(status="failed", reason=f"numerical failure: {exc}", baseline=None)


def _insufficient(reason: str) -> FitResult:
    return FitResult(status="insufficient_history", reason=reason, baseline=None)


def _fit_day_types(m: _DayMatrices, *, min_days_per_type, min_completeness
                   ) -> tuple[dict[int, _GroupFit], dict[int, str]]:
    """Each day type's own robust fit, where it has enough days; why not, where it has not."""
    fits: dict[int, _GroupFit] = {}
    reasons: dict[int, str] = {}
    for code in range(len(DAY_TYPES)):
        idx = np.flatnonzero(m.types == code)
        if idx.size < min_days_per_type:
            reasons[code] = f"{idx.size} usable days (need {min_days_per_type})"
            continue
        if m.Y[idx].sum() <= 0:
            reasons[code] = "no vehicles counted"
            continue
        try:
            fit = _fit_group(m.Y[idx], m.X[idx], m.weights[idx], m.types[idx], m.scheduled[idx],
                             min_completeness=min_completeness)
        except FitError as exc:
            reasons[code] = f"fit failed ({exc})"
            continue
        if fit.day_keep.sum() < min_days_per_type:
            kept = int(fit.day_keep.sum())
            reasons[code] = f"{kept} days left after trimming (need {min_days_per_type})"
            continue
        fits[code] = fit
    return fits, reasons


def _profile_of(name: str, fit: _GroupFit, *, fitted_from: str, expected, log_var, days_used,
                smoothing) -> DayTypeProfile:
    return DayTypeProfile(
        day_type=name,
        fitted_from=fitted_from,
        expected=np.maximum(expected, np.finfo(float).tiny),
        log_se=np.sqrt(log_var),
        day_alpha=float(fit.day_alpha),
        interval_alpha=float(fit.interval_alpha),
        distribution=fit.distribution,
        dispersion_p_value=float(fit.p_value),
        days_used=days_used,
        smoothing=_json_safe(smoothing),
    )


def _own_profile(name: str, fit: _GroupFit) -> DayTypeProfile:
    """A day type's profile from its own fit."""
    return _profile_of(name, fit, fitted_from=name, expected=np.exp(fit.beta),
                       log_var=fit.log_var + (fit.day_alpha + fit.hour_alpha) / fit.d_eff,
                       days_used=int(fit.day_keep.sum()), smoothing=dict(fit.smoothing))


def _pooled_profile(name: str, pooled: _GroupFit, m: _DayMatrices, members, reason: str
                    ) -> DayTypeProfile:
    """A day type's profile from the pooled fit, scaled to the day type's own level (weighted
    ratio of its kept days' totals to their expectation) when it has kept days."""
    mine = pooled.day_keep & members
    mu = np.exp(pooled.beta)
    if mine.any():
        wk = m.weights[mine]
        m_day = (m.X[mine] * pooled.cell_keep[mine]) @ mu
        y_day = (m.Y[mine] * pooled.cell_keep[mine]).sum(axis=1)
        level = float(np.sum(wk * y_day) / np.sum(wk * m_day))
        level = max(level, 1e-6)
        k_eff = float(wk.sum() ** 2 / np.sum(wk**2))
        level_var = 1.0 / max(float(np.sum(wk * y_day)), 1.0) + pooled.day_alpha / k_eff
    else:
        level, level_var = 1.0, max(pooled.day_alpha, NO_LEVEL_LOG_VAR)
    smoothing = dict(pooled.smoothing)
    smoothing.update({"pooled_days": int(pooled.day_keep.sum()), "level": level,
                      "fallback_reason": reason})
    return _profile_of(name, pooled, fitted_from="pooled", expected=mu * level,
                       log_var=pooled.log_var + (pooled.day_alpha + pooled.hour_alpha)
                       / pooled.d_eff + level_var,
                       days_used=int(mine.sum()), smoothing=smoothing)


def _pooled_dispersion(fits: dict[int, _GroupFit], pooled: _GroupFit | None
                       ) -> tuple[dict[int, _GroupFit], _GroupFit | None]:
    """Day- and interval-level alphas pooled partially across the day types' own fits
    (:func:`pool_alphas`); a day type on the pooled profile takes the pooled values. The
    day level never falls below :data:`LEVEL_VAR_FLOOR`."""
    groups = list(fits.values()) or ([pooled] if pooled is not None else [])
    if not groups:
        return fits, pooled
    day_pool, day_alphas = pool_alphas(
        [g.day_alpha for g in groups], [g.day_info for g in groups],
        [g.smoothing.get("mean_day_expected", 0.0) for g in groups],
        prior_dof=DAY_ALPHA_PRIOR_DAYS, floor=LEVEL_VAR_FLOOR)
    int_pool, int_alphas = pool_alphas(
        [g.interval_alpha for g in groups], [g.interval_info for g in groups],
        [g.smoothing.get("mean_interval_expected", 0.0) for g in groups],
        prior_dof=INTERVAL_ALPHA_PRIOR_CELLS)

    def shrunk(g: _GroupFit, day: float, interval: float) -> _GroupFit:
        smoothing = dict(g.smoothing, day_alpha_pooled=day_pool, interval_alpha_pooled=int_pool)
        return dataclasses.replace(g, day_alpha=day, interval_alpha=interval,
                                   smoothing=smoothing)

    if fits:
        fits = {code: shrunk(g, d, i) for (code, g), d, i
                in zip(fits.items(), day_alphas, int_alphas, strict=True)}
        if pooled is not None:
            # the pooled fit's own day alpha also holds the day types' level differences
            pooled = shrunk(pooled, max(day_pool, LEVEL_VAR_FLOOR), int_pool)
    elif pooled is not None:
        pooled = shrunk(pooled, day_alphas[0], int_alphas[0])
    return fits, pooled


def _assemble(m: _DayMatrices, *, interval_s, bins_per_day, min_days_per_type, min_completeness,
              window, days_dropped, timezone, holiday_calendar, need_days) -> FitResult:
    """Own fits where a day type has the days, the pooled fit for the others, one Baseline."""
    fits, reasons = _fit_day_types(m, min_days_per_type=min_days_per_type,
                                   min_completeness=min_completeness)
    pooled = None
    if len(fits) < len(DAY_TYPES):
        pooled = _fit_group(m.Y, m.X, m.weights, m.types, m.scheduled,
                            min_completeness=min_completeness)
        if pooled.day_keep.sum() < need_days:
            return _insufficient(
                f"{int(pooled.day_keep.sum())} days left after trimming (need {need_days})")

    fits, pooled = _pooled_dispersion(fits, pooled)
    profiles: dict[str, DayTypeProfile] = {}
    used = trimmed = days_trimmed = 0
    for code, name in enumerate(DAY_TYPES):
        members = m.types == code
        if code in fits:
            fit = fits[code]
            profiles[name] = _own_profile(name, fit)
            cell_keep, day_keep = fit.cell_keep, fit.day_keep
        else:
            assert pooled is not None
            profiles[name] = _pooled_profile(name, pooled, m, members, reasons.get(code, ""))
            cell_keep, day_keep = pooled.cell_keep[members], pooled.day_keep[members]
        Xm = m.X[members]
        used += int((Xm * cell_keep).sum())
        trimmed += int((Xm * ~cell_keep).sum())
        days_trimmed += int((~day_keep).sum())

    baseline = Baseline(
        interval_s=interval_s,
        bins_per_day=bins_per_day,
        profiles=profiles,
        window_start_s=window[0],
        window_end_s=window[1],
        intervals_used=used,
        intervals_trimmed=trimmed,
        days_dropped=days_dropped,
        days_trimmed=days_trimmed,
        timezone=timezone,
        holiday_calendar=holiday_calendar,
    )
    return FitResult(status="fitted", reason=None, baseline=baseline)


# ---------------------------------------------------------------------------------------------
# Planners' figures
# ---------------------------------------------------------------------------------------------


def daily_profile_summary(baseline: Baseline, *, lanes: int) -> dict:
    """Planners' figures per day type from a baseline (24-hour day, local time).

    Parameters
    ----------
    baseline : Baseline
        Fitted baseline.
    lanes : int
        Lanes the detector counts (for per-lane volume).

    Returns
    -------
    dict
        Keyed by day type: ``daily_volume`` (vehicles/day), ``daily_volume_per_lane``,
        ``hourly_volume`` (24 values, vehicles in each local clock hour), ``busiest_hour``
        (``start`` "HH:MM", ``start_s`` seconds after local midnight, ``volume`` vehicles,
        ``share_of_expected_day`` = its volume / the expected daily volume of this day type),
        plus ``fitted_from``. Volumes are rounded to 3 significant figures, shares to 3
        decimals: the fit's standard errors are a few percent, so more digits say nothing.

        The share is *not* the design-hour K-factor (the 30th highest hour of a year over
        AADT), and a peak-hour factor from the smoothed expected curve is not the Highway
        Capacity Manual's (observed 15-minute volumes): both come from counted data through
        :mod:`service.stats.figures`.
    """
    if isinstance(lanes, bool) or not isinstance(lanes, int | np.integer) or lanes < 1:
        raise ValueError("lanes must be a positive integer")
    per_hour = 3600 // baseline.interval_s
    out: dict[str, Any] = {}
    for name in DAY_TYPES:
        expected = np.asarray(baseline.profiles[name].expected, dtype=float)
        daily = float(expected.sum())
        hourly = expected.reshape(24, per_hour).sum(axis=1)
        csum = np.concatenate(([0.0], np.cumsum(expected)))
        rolling = csum[per_hour:] - csum[:-per_hour]  # hour starting at each bin, within the day
        start_bin = int(np.argmax(rolling))
        volume = float(rolling[start_bin])
        start_s = start_bin * baseline.interval_s
        out[name] = {
            "fitted_from": baseline.profiles[name].fitted_from,
            "daily_volume": _significant(daily),
            "daily_volume_per_lane": _significant(daily / int(lanes)),
            "hourly_volume": [_significant(float(v)) for v in hourly],
            "busiest_hour": {
                "start": f"{start_s // 3600:02d}:{start_s % 3600 // 60:02d}",
                "start_s": int(start_s),
                "volume": _significant(volume),
                "share_of_expected_day": round(volume / daily, 3) if daily > 0 else 0.0,
            },
        }
    return out


def _significant(value: float, digits: int = 3) -> float:
    """``value`` rounded to ``digits`` significant figures."""
    if value == 0 or not math.isfinite(value):
        return value
    return round(value, digits - 1 - int(math.floor(math.log10(abs(value)))))
