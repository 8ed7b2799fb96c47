"""Planners' figures from clean volumes: imputation of missing or flagged intervals, AADT by the
AASHTO method, plain ADT, monthly and day-of-week factors, the 30th highest hour (K30, DHV),
the directional distribution D, AM and PM peak hours with their peak-hour factor, and
uncertainty intervals for all of them.

Pure numpy: no database, no web. Times are local to the detector unless a name says UTC.

Sources (editions to be confirmed before citing as read):

* AADT, AASHTO method: FHWA *Traffic Monitoring Guide* (TMG, 2016 edition, FHWA-PL-17-003,
  chapter 3), which adopts the AASHTO *Guidelines for Traffic Data Programs* (2009): the
  average of the 12 monthly averages of the 7 monthly average days of the week. Formula from
  memory; the sufficiency rule applied here (at least one complete day in each of the
  7 x 12 month/day-of-week cells, a complete day having all 24 hours) is also from memory.
* Peak-hour factor: Highway Capacity Manual, PHF = V / (4 x V15), where V is the hourly volume
  and V15 the highest 15-minute volume within that hour; it lies in [0.25, 1.0].
* K30 and the design hour (the 30th highest hourly volume of the year): common practice in US
  highway design (AASHTO *A Policy on Geometric Design of Highways and Streets*, from memory).

Imputation
    A missing or flagged interval is imputed as ``mu * g`` where ``mu`` is the baseline's
    expected volume and ``g`` the day's level. ``g`` has a gamma prior with mean ``L`` (the
    ratio of observed to expected volume on the neighboring days, which carries the season)
    and relative variance ``day_alpha`` (the baseline's day-level dispersion); the day's own
    observed intervals update it (Poisson-gamma conjugacy). Given ``g`` an interval is negative
    binomial with the baseline's ``interval_alpha``. Uncertainty intervals of the figures come
    from joint draws of the day levels and the hourly remainders (:func:`annual_figures`); the
    baseline's own estimation error of the time-of-day shape is not drawn (it is shared by the
    day's observed and imputed intervals and cancels to first order in the level).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from statistics import NormalDist
from typing import Any

import numpy as np

__all__ = [
    "AadtResult",
    "HourlyClean",
    "aashto_aadt",
    "annual_figures",
    "CleanIntervals",
    "DayLevels",
    "bucket_totals",
    "calendar_of_days",
    "clean_intervals",
    "daily_totals",
    "hourly_clean",
    "normal_interval",
    "day_levels",
    "directional_distribution",
    "directional_figures",
    "kth_highest",
    "peak_hour_factor",
    "peak_hours",
    "quarter_table",
]

DESIGN_HOUR_RANK = 30  # the 30th highest hour of the year (common practice, US design)
LEVEL_WINDOW_DAYS = 14  # neighbors each side that set a day's prior level
MIN_DAY_ALPHA = 0.002  # floor of the day-level variance: a Poisson fit still has some
MIN_PRIOR_EXPECTED = 50.0  # vehicles: less expected volume nearby and the window widens
SEASON_REL_VAR = 0.1**2  # own rule: a month far from data may sit +-10 % off the period's level
AM_END_S = 12 * 3600  # AM peak hours end by local noon; PM ones start at or after it
MONTHS, WEEKDAYS = 12, 7


# ---------------------------------------------------------------------------------------------
# Peak-hour factor
# ---------------------------------------------------------------------------------------------


def peak_hour_factor(quarter_volumes: Any) -> np.ndarray:
    """Highway Capacity Manual peak-hour factor of hours given as four 15-minute volumes.

    Parameters
    ----------
    quarter_volumes : array_like, shape (..., 4)
        Vehicles in each 15-minute period of the hour, observed (never smoothed).

    Returns
    -------
    numpy.ndarray, shape (...)
        ``V / (4 * max(V15))`` in [0.25, 1.0]; NaN for an hour with no vehicles (undefined).

    Raises
    ------
    ValueError
        Not four quarters, or a negative volume.
    """
    q = np.asarray(quarter_volumes, dtype=float)
    if q.shape[-1:] != (4,):
        raise ValueError(f"a peak-hour factor needs four 15-minute volumes, got shape {q.shape}")
    if np.any(q < 0):
        raise ValueError("15-minute volumes must be >= 0")
    peak = q.max(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(peak > 0, q.sum(axis=-1) / (4.0 * peak), np.nan)


# ---------------------------------------------------------------------------------------------
# Day levels and imputation
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class DayLevels:
    """Each day's level (observed / baseline-expected volume), :func:`day_levels`.

    Attributes
    ----------
    shape, rate : numpy.ndarray, shape (n_days,)
        Gamma posterior of the level given its prior mean: mean ``shape / rate``.
    shared_sd : numpy.ndarray, shape (n_days,)
        Log-scale standard deviation of the error of the prior mean, as it reaches the day's
        level; shared by the days of one ``block`` (they lean on the same neighbors).
    block : numpy.ndarray of int, shape (n_days,)
        Days whose prior means share an error: windows of neighbors, and one block for the
        days far from any data (they share the period's level).
    """

    shape: np.ndarray
    rate: np.ndarray
    shared_sd: np.ndarray
    block: np.ndarray


def day_levels(observed: Any, expected_observed: Any, *, day_alpha: Any,
               window_days: int = LEVEL_WINDOW_DAYS) -> DayLevels:
    """Each day's level with its uncertainty, from its own counts and its neighbors'.

    The prior mean is the ratio of observed to expected volume over the ``window_days``
    neighbors each side (the season), or over the whole period when they expect fewer than
    :data:`MIN_PRIOR_EXPECTED` vehicles; the day's own spread around it is ``day_alpha`` (plus
    :data:`SEASON_REL_VAR`, shared by its block, for a day far from data). That ratio is an average of ``n_eff``
    days, so its own error (relative variance ``day_alpha / n_eff``) is kept apart, shared by
    the days leaning on it.

    Parameters
    ----------
    observed : array_like, shape (n_days,)
        Vehicles counted in the day's usable intervals (consecutive local days).
    expected_observed : array_like, shape (n_days,)
        Baseline-expected vehicles over those same intervals.
    day_alpha : array_like, shape (n_days,) or scalar
        Relative variance of a day's level around its neighbors' (the baseline's day_alpha).
    window_days : int
        Neighbors on each side.

    Returns
    -------
    DayLevels
    """
    y = np.asarray(observed, dtype=float)
    e = np.asarray(expected_observed, dtype=float)
    alpha = np.maximum(np.broadcast_to(np.asarray(day_alpha, dtype=float), y.shape), MIN_DAY_ALPHA)
    n = y.size
    cy = np.concatenate(([0.0], np.cumsum(y)))
    ce = np.concatenate(([0.0], np.cumsum(e)))
    ce2 = np.concatenate(([0.0], np.cumsum(e * e)))
    idx = np.arange(n)
    lo = np.maximum(idx - window_days, 0)
    hi = np.minimum(idx + window_days + 1, n)
    near_y = cy[hi] - cy[lo] - y  # the day's own intervals update the prior, not set it
    near_e = ce[hi] - ce[lo] - e
    near_e2 = ce2[hi] - ce2[lo] - e * e
    total_y, total_e, total_e2 = float(cy[-1]), float(ce[-1]), float(ce2[-1])
    overall = (total_y + 1.0) / (total_e + 1.0) if total_e > 0 else 1.0
    far = near_e < MIN_PRIOR_EXPECTED
    with np.errstate(invalid="ignore", divide="ignore"):
        prior_mean = np.where(far, overall, near_y / near_e)
        n_eff = np.where(far, total_e**2 / total_e2 if total_e2 > 0 else 1.0,
                         near_e**2 / near_e2)  # days behind the prior mean, effectively
    prior_mean = np.maximum(prior_mean, 1e-3)
    n_eff = np.maximum(np.nan_to_num(n_eff, nan=1.0), 1.0)
    shape0 = 1.0 / alpha
    rate0 = shape0 / prior_mean
    shape, rate = shape0 + y, rate0 + e
    weight = rate0 / rate  # how much the day's level rests on the prior mean
    # A day far from data takes the period's level, which misses its season: that error is
    # shared by its block of neighbors (own rule: SEASON_REL_VAR per block of 2w+1 days).
    shared_var = alpha / n_eff + np.where(far, SEASON_REL_VAR, 0.0)
    shared_sd = weight * np.sqrt(np.log1p(shared_var))
    block = idx // (2 * window_days + 1)
    return DayLevels(shape=shape, rate=rate, shared_sd=shared_sd, block=block.astype(np.intp))


def bucket_totals(bucket: Any, *, observed: Any, imputed_mean: Any, imputed_var: Any,
                  imputed: Any, level_rel_var: Any) -> dict[str, np.ndarray]:
    """Sums of clean volumes over buckets (15 min, hour, day; never across a local day).

    Parameters
    ----------
    bucket : array_like of int, shape (n,)
        Bucket key of each interval, non-decreasing (time order).
    observed : array_like, shape (n,)
        Observed vehicles (0 where imputed).
    imputed_mean, imputed_var : array_like, shape (n,)
        Mean and variance of each imputed interval given its day's level (0 where observed).
    imputed : array_like of bool, shape (n,)
    level_rel_var : array_like, shape (n,)
        Relative variance of the level of each interval's day: the imputed intervals of one
        day share it, so its part of a bucket's variance is ``var * (sum of means)**2``.

    Returns
    -------
    dict of numpy.ndarray
        ``bucket`` (the distinct keys), ``first`` (index of each bucket's first interval),
        ``observed``, ``imputed_mean``, ``variance`` (of the imputed part), ``intervals`` and
        ``imputed_intervals``; vehicles per bucket.
    """
    b = np.asarray(bucket)
    keys, first = np.unique(b, return_index=True)
    if b.size == 0:
        zero = np.zeros(0)
        return {"bucket": keys, "first": first, "observed": zero, "imputed_mean": zero,
                "variance": zero, "intervals": first, "imputed_intervals": first}
    mean_i = np.asarray(imputed_mean, dtype=float)
    obs = np.add.reduceat(np.asarray(observed, dtype=float), first)
    mean = np.add.reduceat(mean_i, first)
    var = np.add.reduceat(np.asarray(imputed_var, dtype=float), first)
    n_imp = np.add.reduceat(np.asarray(imputed, dtype=bool).astype(np.int64), first)
    lv = np.add.reduceat(np.asarray(level_rel_var, dtype=float) * mean_i, first)
    with np.errstate(invalid="ignore", divide="ignore"):
        lv = np.where(mean > 0, lv / mean, 0.0)
    return {"bucket": keys, "first": first, "observed": obs, "imputed_mean": mean,
            "variance": var + lv * mean**2, "intervals": np.diff(np.append(first, b.size)),
            "imputed_intervals": n_imp}


def normal_interval(observed: Any, imputed_mean: Any, variance: Any, *, level: float = 0.95
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Central interval of ``observed + imputed`` with the imputed part normal (clipped at 0)."""
    z = NormalDist().inv_cdf(0.5 + level / 2.0)
    obs = np.asarray(observed, dtype=float)
    mean = np.asarray(imputed_mean, dtype=float)
    sd = np.sqrt(np.maximum(np.asarray(variance, dtype=float), 0.0))
    return obs + np.maximum(mean - z * sd, 0.0), obs + mean + z * sd


@dataclass(frozen=True)
class CleanIntervals:
    """Clean volumes interval by interval (:func:`clean_intervals`); arrays of shape (n,)
    unless stated, vehicles per interval.

    Attributes
    ----------
    observed : numpy.ndarray
        Counted vehicles where usable, 0 where imputed.
    imputed : numpy.ndarray of bool
        Missing or flagged, replaced by ``imputed_mean``.
    imputed_mean : numpy.ndarray
        ``mu * E[level]`` where imputed, else 0.
    imputed_var : numpy.ndarray
        NB variance of an imputed interval given its day's level, else 0.
    level_rel_var : numpy.ndarray
        Relative variance of the interval's day level (shared by the day's intervals).
    mu, interval_alpha : numpy.ndarray
        The baseline's expected volume (level 1) and interval-level NB alpha.
    day : numpy.ndarray of int
        Day index of each interval.
    level_shape, level_rate : numpy.ndarray, shape (n_days,)
        Gamma posterior of each day's level.
    level_shared_sd, level_block : numpy.ndarray, shape (n_days,)
        The shared error of the days' prior means (:class:`DayLevels`).
    """

    observed: np.ndarray
    imputed: np.ndarray
    imputed_mean: np.ndarray
    imputed_var: np.ndarray
    level_rel_var: np.ndarray
    mu: np.ndarray
    interval_alpha: np.ndarray
    day: np.ndarray
    level_shape: np.ndarray
    level_rate: np.ndarray
    level_shared_sd: np.ndarray
    level_block: np.ndarray

    @property
    def volume(self) -> np.ndarray:
        """Observed or imputed vehicles per interval."""
        return self.observed + self.imputed_mean


def clean_intervals(count: Any, usable: Any, *, mu: Any, interval_alpha: Any, day_alpha: Any,
                    day: Any) -> CleanIntervals:
    """Replace unusable intervals by the baseline times the day's estimated level.

    Parameters
    ----------
    count : array_like, shape (n,)
        Stored vehicles per interval (any value where not usable).
    usable : array_like of bool, shape (n,)
        Counted and not flagged for replacement.
    mu, interval_alpha, day_alpha : array_like, shape (n,)
        The baseline's expected volume and NB alphas for each interval (its day type and bin).
    day : array_like of int, shape (n,)
        Index of the interval's local day, 0..n_days-1, non-decreasing, every day present.

    Returns
    -------
    CleanIntervals
    """
    ok = np.asarray(usable, dtype=bool)
    y = np.where(ok, np.asarray(count, dtype=float), 0.0)
    m = np.asarray(mu, dtype=float)
    ia = np.asarray(interval_alpha, dtype=float)
    d = np.asarray(day, dtype=np.intp)
    n_days = int(d[-1]) + 1 if d.size else 0
    first = np.searchsorted(d, np.arange(n_days))
    if d.size and np.any(np.diff(first) <= 0):
        raise ValueError("day must be non-decreasing with every day present")
    y_day = np.add.reduceat(y, first) if d.size else np.zeros(0)
    e_day = np.add.reduceat(np.where(ok, m, 0.0), first) if d.size else np.zeros(0)
    alpha_day = np.asarray(day_alpha, dtype=float)[first] if d.size else np.zeros(0)
    levels = day_levels(y_day, e_day, day_alpha=alpha_day)
    shape, rate = levels.shape, levels.rate
    level = (shape / rate)[d]
    imp = ~ok
    mean = np.where(imp, m * level, 0.0)
    return CleanIntervals(observed=y, imputed=imp, imputed_mean=mean,
                          imputed_var=np.where(imp, mean + ia * mean**2, 0.0),
                          level_rel_var=(1.0 / shape + np.expm1(levels.shared_sd**2))[d],
                          mu=m, interval_alpha=ia, day=d, level_shape=shape, level_rate=rate,
                          level_shared_sd=levels.shared_sd, level_block=levels.block)


def calendar_of_days(local_day: Any) -> tuple[np.ndarray, np.ndarray]:
    """Month 1..12 and day of week (Monday = 0) of local dates given as days since 1970-01-01."""
    days = np.asarray(local_day, dtype=np.int64)
    months = days.astype("datetime64[D]").astype("datetime64[M]").astype(np.int64) % 12 + 1
    return months, (days + 3) % 7  # 1970-01-01 was a Thursday


def quarter_table(clean: CleanIntervals, *, quarter_of_day: Any, per_quarter: int
                  ) -> np.ndarray:
    """Observed vehicles per local 15-minute period, shape (n_days, 96): NaN unless every one
    of the period's ``per_quarter`` intervals was counted and usable (so a repeated DST hour,
    a gap or a flagged interval leaves the period out of peak-hour factors)."""
    q = np.asarray(quarter_of_day, dtype=np.intp)
    n_days = clean.level_shape.size
    cell = clean.day * 96 + q
    total = np.bincount(cell, weights=clean.observed, minlength=n_days * 96)
    n = np.bincount(cell, minlength=n_days * 96)
    bad = np.bincount(cell, weights=clean.imputed.astype(float), minlength=n_days * 96)
    table = np.where((n == per_quarter) & (bad == 0), total, np.nan)
    return table.reshape(n_days, 96)


def hourly_clean(clean: CleanIntervals, *, hour_key: Any, month: Any, day_of_week: Any
                 ) -> HourlyClean:
    """Sum clean intervals into local clock hours (``hour_key`` non-decreasing, never across a
    local day) for :func:`annual_figures`; ``month``/``day_of_week`` per day."""
    key = np.asarray(hour_key)
    _, first = np.unique(key, return_index=True)
    imp = clean.imputed
    sum_ = np.add.reduceat
    n_imp = sum_(imp.astype(np.int64), first)
    n_all = np.diff(np.append(first, key.size))
    day_imp = np.add.reduceat(imp.astype(np.int64), np.searchsorted(
        clean.day, np.arange(clean.level_shape.size)))
    day_n = np.diff(np.append(np.searchsorted(clean.day, np.arange(clean.level_shape.size)),
                              clean.day.size))
    return HourlyClean(
        observed=sum_(clean.observed, first),
        imputed_mean=sum_(np.where(imp, clean.mu, 0.0), first),
        imputed_sq=sum_(np.where(imp, clean.interval_alpha * clean.mu**2, 0.0), first),
        day=clean.day[first], intervals=n_all, imputed_intervals=n_imp,
        level_shape=clean.level_shape, level_rate=clean.level_rate,
        level_shared_sd=clean.level_shared_sd, level_block=clean.level_block,
        month=np.asarray(month), day_of_week=np.asarray(day_of_week),
        complete_day=day_imp == 0, observed_day=day_imp < day_n)


# ---------------------------------------------------------------------------------------------
# Annual figures
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class AadtResult:
    """AASHTO AADT and its parts (vehicles per day).

    Attributes
    ----------
    aadt : numpy.ndarray
        AADT (one value, or one per draw).
    madt : numpy.ndarray, shape (12, ...)
        Monthly average daily traffic (the average of the month's day-of-week averages);
        NaN for a month without days.
    madw : numpy.ndarray, shape (12, 7, ...)
        Monthly average day of week; NaN for an empty cell.
    days : numpy.ndarray of int, shape (12, 7)
        Days behind each cell.
    """

    aadt: np.ndarray
    madt: np.ndarray
    madw: np.ndarray
    days: np.ndarray


def aashto_aadt(daily_volume: Any, *, month: Any, day_of_week: Any) -> AadtResult:
    """AADT by the AASHTO method (FHWA TMG): average the days of each day of week within each
    month, average those 7 within each month, then average the 12 months.

    Parameters
    ----------
    daily_volume : array_like, shape (n_days,) or (n_days, n_draws)
        Vehicles per local day; NaN for a day left out.
    month : array_like of int, shape (n_days,)
        Month 1..12.
    day_of_week : array_like of int, shape (n_days,)
        Monday = 0 .. Sunday = 6.

    Returns
    -------
    AadtResult
        An empty cell leaves its month's average to the cells present, an empty month leaves
        the year's to the months present (the caller reports both through ``days``).
    """
    v = np.asarray(daily_volume, dtype=float)
    m = np.asarray(month, dtype=np.intp) - 1
    w = np.asarray(day_of_week, dtype=np.intp)
    if v.shape[0] != m.size or m.size != w.size:
        raise ValueError("daily_volume, month and day_of_week must have one entry per day")
    if m.size and (m.min() < 0 or m.max() >= MONTHS or w.min() < 0 or w.max() >= WEEKDAYS):
        raise ValueError("month must be 1..12 and day_of_week 0..6")
    flat = v.reshape(v.shape[0], -1)
    present = ~np.isnan(flat)
    cell = m * WEEKDAYS + w
    onehot = np.zeros((MONTHS * WEEKDAYS, m.size))
    onehot[cell, np.arange(m.size)] = 1.0
    sums = onehot @ np.where(present, flat, 0.0)
    n = onehot @ present.astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        madw = np.where(n > 0, sums / n, np.nan).reshape(MONTHS, WEEKDAYS, -1)
        madt = _nanmean(madw, axis=1)
        aadt = _nanmean(madt, axis=0)
    days = (onehot @ present[:, :1].astype(float)).reshape(MONTHS, WEEKDAYS).astype(np.int64)
    tail = v.shape[1:]
    return AadtResult(aadt=aadt.reshape(tail), madt=madt.reshape((MONTHS, *tail)),
                      madw=madw.reshape((MONTHS, WEEKDAYS, *tail)), days=days)


def _nanmean(a: np.ndarray, axis: int) -> np.ndarray:
    ok = ~np.isnan(a)
    n = ok.sum(axis=axis)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, np.where(ok, a, 0.0).sum(axis=axis) / n, np.nan)


def kth_highest(hourly_volume: Any, k: int = DESIGN_HOUR_RANK) -> np.ndarray:
    """The k-th highest value along axis 0 (NaN-free input), e.g. the 30th highest hour."""
    h = np.asarray(hourly_volume, dtype=float)
    if h.shape[0] < k:
        raise ValueError(f"need at least {k} hours, got {h.shape[0]}")
    if h.ndim == 2 and h.shape[1] > 1:
        # Only hours that can reach the top k in some column matter: those whose largest
        # value reaches the k-th highest of the rows' smallest values.
        floor = -np.partition(-h.min(axis=1), k - 1)[k - 1]
        h = h[h.max(axis=1) >= floor]
    return -np.partition(-h, k - 1, axis=0)[k - 1]


def directional_distribution(volume_a: Any, volume_b: Any, *, k: int = DESIGN_HOUR_RANK
                             ) -> tuple[np.ndarray, np.ndarray]:
    """Directional distribution D of a pair of opposite directions.

    D is the peak direction's share of the two-way volume over the ``k`` highest two-way hours
    (the design hour and those above it). The textbook takes the design hour alone; summing
    the top ``k`` hours is our choice, for a figure that does not jump with one hour's rank.

    Parameters
    ----------
    volume_a, volume_b : array_like, shape (n_hours,) or (n_hours, n_draws)
        Hourly volumes of the two directions over the same hours.

    Returns
    -------
    d, a_is_peak : numpy.ndarray
        D in [0.5, 1.0] and whether direction a is the peak one.
    """
    a = np.asarray(volume_a, dtype=float)
    b = np.asarray(volume_b, dtype=float)
    if a.shape != b.shape:
        raise ValueError("the two directions need the same hours")
    two_way = a + b
    if two_way.shape[0] < k:
        raise ValueError(f"need at least {k} hours, got {two_way.shape[0]}")
    top = np.argpartition(-two_way, k - 1, axis=0)[:k]
    sa = np.take_along_axis(a, top, axis=0).sum(axis=0)
    sb = np.take_along_axis(b, top, axis=0).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        d = np.maximum(sa, sb) / (sa + sb)
    return d, sa >= sb


def peak_hours(quarters: Any, *, day_type: Any, day_types: tuple[str, ...], level: float = 0.95,
               draws: int = 400, seed: int = 0) -> dict[str, Any]:
    """AM and PM peak hours per day type with their HCM peak-hour factor, from observed
    15-minute volumes.

    The peak hour of a day type is the 60 minutes (on a 15-minute grid) with the highest mean
    volume over the days of that type whose four quarters were all observed; AM hours end by
    local noon, PM hours start at or after it. Its PHF is the mean over those days of each
    day's PHF (:func:`peak_hour_factor`), with a bootstrap interval resampling days.

    Parameters
    ----------
    quarters : array_like, shape (n_days, 96)
        Observed vehicles per local 15-minute period; NaN where not fully observed or flagged.
    day_type : array_like of int, shape (n_days,)
        Day-type code of each day (index into ``day_types``).
    day_types : tuple of str
        Names of the codes.

    Returns
    -------
    dict
        Per day type, ``am`` and ``pm``: ``start`` "HH:MM" local, ``volume`` (mean hourly
        vehicles), ``phf`` with ``low``/``high``, and ``days``; None without a usable day.
    """
    q = np.asarray(quarters, dtype=float)
    codes = np.asarray(day_type)
    if q.ndim != 2 or q.shape[1] != 96:
        raise ValueError("quarters must be shaped (days, 96)")
    # hours starting at each quarter that stay inside the day: 93 per day
    hours = np.stack([q[:, i:i + 93] for i in range(4)], axis=-1)  # (days, 93, 4)
    complete = ~np.isnan(hours).any(axis=-1)
    hourly = np.where(complete, np.nansum(hours, axis=-1), 0.0)
    rng = np.random.default_rng(seed)
    lo_q, hi_q = (1.0 - level) / 2.0 * 100, (1.0 + level) / 2.0 * 100
    out: dict[str, Any] = {}
    for code, name in enumerate(day_types):
        rows = codes == code
        entry: dict[str, Any] = {}
        for part, starts in (("am", range(0, 45)), ("pm", range(48, 93))):
            idx = np.asarray(starts)
            n = complete[rows][:, idx].sum(axis=0)
            with np.errstate(invalid="ignore", divide="ignore"):
                mean = np.where(n > 0, hourly[rows][:, idx].sum(axis=0) / n, -1.0)
            if not np.any(n > 0):
                entry[part] = None
                continue
            best = int(idx[int(np.argmax(mean))])
            use = rows & complete[:, best]
            phf = peak_hour_factor(hours[use, best])
            phf = phf[~np.isnan(phf)]
            if phf.size == 0:
                entry[part] = None
                continue
            boot = phf[rng.integers(0, phf.size, size=(draws, phf.size))].mean(axis=1)
            minutes = best * 15
            entry[part] = {"start": f"{minutes // 60:02d}:{minutes % 60:02d}",
                           "volume": float(hourly[use, best].mean()),
                           "phf": float(phf.mean()), "phf_low": float(np.percentile(boot, lo_q)),
                           "phf_high": float(np.percentile(boot, hi_q)), "days": int(phf.size)}
        out[name] = entry
    return out


@dataclass(frozen=True)
class HourlyClean:
    """A period's clean volumes by UTC hour, ready for :func:`annual_figures`.

    Attributes
    ----------
    observed : numpy.ndarray, shape (n_hours,)
        Vehicles counted in the hour's usable intervals.
    imputed_mean : numpy.ndarray, shape (n_hours,)
        Baseline-expected vehicles over the hour's imputed intervals at level 1 (``sum mu``).
    imputed_sq : numpy.ndarray, shape (n_hours,)
        ``sum interval_alpha * mu**2`` over those intervals (the NB excess at level 1).
    day : numpy.ndarray of int, shape (n_hours,)
        Index of the hour's local day into the day arrays, non-decreasing.
    intervals, imputed_intervals : numpy.ndarray of int, shape (n_hours,)
        Scheduled and imputed intervals in the hour.
    level_shape, level_rate : numpy.ndarray, shape (n_days,)
        Gamma posterior of each day's level (:func:`day_levels`).
    level_shared_sd, level_block : numpy.ndarray, shape (n_days,)
        The shared error of the days' prior means (:class:`DayLevels`).
    month, day_of_week : numpy.ndarray of int, shape (n_days,)
        Month 1..12 and Monday = 0 .. Sunday = 6 of each local day.
    complete_day : numpy.ndarray of bool, shape (n_days,)
        Days observed in full (no imputed interval): the AASHTO method's measured days.
    observed_day : numpy.ndarray of bool, shape (n_days,)
        Days with at least one usable interval.
    """

    observed: np.ndarray
    imputed_mean: np.ndarray
    imputed_sq: np.ndarray
    day: np.ndarray
    intervals: np.ndarray
    imputed_intervals: np.ndarray
    level_shape: np.ndarray
    level_rate: np.ndarray
    level_shared_sd: np.ndarray
    level_block: np.ndarray
    month: np.ndarray
    day_of_week: np.ndarray
    complete_day: np.ndarray
    observed_day: np.ndarray

    def point(self) -> np.ndarray:
        """Clean hourly volumes: observed plus imputed at the day's posterior mean level."""
        return self.observed + self.imputed_mean * (self.level_shape / self.level_rate)[self.day]

    def draws(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """Joint draws of the clean hourly volumes, shape (n_hours, n): a gamma level per day
        shared by its hours (times a log-normal error of its prior mean shared by its block),
        then a normal remainder per hour with the NB variance."""
        out = np.repeat(self.observed[:, None], n, axis=1)
        rows = np.flatnonzero(self.imputed_mean > 0)  # only these vary
        if rows.size:
            days = self.day[rows]
            g = rng.gamma(self.level_shape[:, None], 1.0 / self.level_rate[:, None],
                          size=(self.level_shape.size, n))
            sd = self.level_shared_sd[:, None]
            shared = rng.standard_normal((int(self.level_block.max()) + 1, n))[self.level_block]
            g = (g * np.exp(shared * sd - 0.5 * sd * sd))[days]
            m = self.imputed_mean[rows, None] * g
            var = m + self.imputed_sq[rows, None] * g * g
            noise = rng.standard_normal(m.shape) * np.sqrt(var)
            out[rows] += np.maximum(m + noise, 0.0)
        return out


def _interval(point: float, draws: np.ndarray, level: float) -> dict[str, float | None]:
    finite = draws[np.isfinite(draws)]
    if not np.isfinite(point) or finite.size == 0:
        return {"value": None, "low": None, "high": None}
    lo, hi = np.percentile(finite, [(1.0 - level) / 2.0 * 100, (1.0 + level) / 2.0 * 100])
    return {"value": float(point), "low": float(min(lo, point)), "high": float(max(hi, point))}


def daily_totals(hourly: Any, day: Any, n_days: int) -> np.ndarray:
    """Sum hourly volumes (axis 0) into days (``day`` non-decreasing, every day present)."""
    h = np.asarray(hourly, dtype=float)
    d = np.asarray(day)
    first = np.searchsorted(d, np.arange(n_days))
    return np.add.reduceat(h, first, axis=0)


def _combined(members: Sequence[HourlyClean], draws: int, rng: np.random.Generator
              ) -> tuple[np.ndarray, np.ndarray]:
    """Point and drawn clean hourly volumes of the sum of ``members`` (same hours)."""
    first = members[0]
    for m in members[1:]:
        if m.observed.shape != first.observed.shape or not np.array_equal(m.day, first.day):
            raise ValueError("members of a group must cover the same local hours")
    point = np.sum([m.point() for m in members], axis=0)
    drawn = members[0].draws(draws, rng)
    for m in members[1:]:
        drawn += m.draws(draws, rng)
    return point, drawn


def annual_figures(members: Sequence[HourlyClean], *, level: float = 0.95, draws: int = 200,
                   seed: int = 0, k: int = DESIGN_HOUR_RANK) -> dict[str, Any]:
    """AADT (AASHTO), ADT, monthly and day-of-week factors, the k-th highest hour, K and DHV of
    one detector or the sum of a group's (``members``), each with a ``level`` uncertainty
    interval from ``draws`` joint draws of the imputed part.

    Returns
    -------
    dict
        ``aadt``, ``adt``, ``hv30``, ``k30``, ``dhv`` (each ``value``/``low``/``high``),
        ``monthly_factors`` and ``day_of_week_factors`` (AADT / month or day-of-week average,
        12 and 7 values, None where empty), ``days`` (in the period, complete, with data,
        imputed in full), ``sufficiency`` (the AASHTO cells with a complete day), and
        ``imputed_share`` (of intervals).
    """
    if not members:
        raise ValueError("no members")
    clean = members[0]
    n_days = clean.level_shape.size
    if n_days == 0 or clean.observed.size < k:
        raise ValueError(f"need at least {k} hours in the period")
    rng = np.random.default_rng(seed)
    point_h, draw_h = _combined(members, draws, rng)
    complete = np.logical_and.reduce([m.complete_day for m in members])
    with_data = np.logical_or.reduce([m.observed_day for m in members])
    point_d = daily_totals(point_h, clean.day, n_days)
    draw_d = daily_totals(draw_h, clean.day, n_days)
    aashto = aashto_aadt(point_d, month=clean.month, day_of_week=clean.day_of_week)
    aashto_draws = aashto_aadt(draw_d, month=clean.month, day_of_week=clean.day_of_week)
    adt, adt_draws = point_d.mean(), draw_d.mean(axis=0)
    hv_draws = kth_highest(draw_h, k)
    # An order statistic of imputed hours is not the order statistic of their means (the
    # means have no spread): its estimate is the median over the draws.
    hv = float(np.median(hv_draws)) if np.any(draw_h != point_h[:, None]) else kth_highest(point_h, k)
    aadt = float(aashto.aadt)
    with np.errstate(invalid="ignore", divide="ignore"):
        k_draws = hv_draws / aashto_draws.aadt
        month_f = aadt / aashto.madt
        dow_f = aadt / _nanmean(aashto.madw, axis=0)
    measured = aashto_aadt(np.where(complete, point_d, np.nan), month=clean.month,
                           day_of_week=clean.day_of_week)
    cells_complete = int((measured.days > 0).sum())
    intervals = sum(int(m.intervals.sum()) for m in members)
    imputed = sum(int(m.imputed_intervals.sum()) for m in members)
    return {
        "aadt": _interval(aadt, aashto_draws.aadt, level),
        "adt": _interval(float(adt), adt_draws, level),
        "hv30": _interval(float(hv), hv_draws, level),
        "k30": _interval(float(hv / aadt) if aadt > 0 else float("nan"), k_draws, level),
        "dhv": _interval(float(hv), hv_draws, level),
        "monthly_factors": [None if not np.isfinite(f) else float(f) for f in month_f],
        "day_of_week_factors": [None if not np.isfinite(f) else float(f) for f in dow_f],
        "days": {"in_period": int(n_days), "complete": int(complete.sum()),
                 "with_data": int(with_data.sum()), "fully_imputed": int((~with_data).sum())},
        "sufficiency": {
            "cells_in_period": int((aashto.days > 0).sum()),
            "cells_with_complete_day": cells_complete,
            "meets_rule": bool(cells_complete == MONTHS * WEEKDAYS),
            "aadt_from_complete_days_only": (None if not np.isfinite(measured.aadt)
                                             else float(measured.aadt)),
        },
        "imputed_share": imputed / max(intervals, 1),
        "draws": draws, "level": level,
    }


def directional_figures(direction_a: Sequence[HourlyClean], direction_b: Sequence[HourlyClean],
                        *, level: float = 0.95, draws: int = 200, seed: int = 0,
                        k: int = DESIGN_HOUR_RANK) -> dict[str, Any]:
    """D of two opposite directions (:func:`directional_distribution`) with its interval."""
    rng = np.random.default_rng(seed)
    pa, da = _combined(direction_a, draws, rng)
    pb, db = _combined(direction_b, draws, rng)
    if pa.shape != pb.shape:
        raise ValueError("the two directions must cover the same local hours")
    _, a_peak = directional_distribution(pa, pb, k=k)
    d_draws, _ = directional_distribution(da, db, k=k)
    # like the 30th highest hour, D is taken over the draws (the median), not their means
    d = float(np.median(d_draws))
    return {"d": _interval(d, d_draws, level), "peak_direction": "a" if a_peak else "b"}
