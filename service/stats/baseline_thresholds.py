"""A fitted baseline's scoring thresholds: its typical week and missing rate, calibrated to a
false-alert budget.

Pure numpy: the calibration itself is ``service.stats.thresholds.calibrate``; this
module only turns one ``Baseline`` into what the calibration needs.
"""

from __future__ import annotations

import dataclasses
from typing import NamedTuple

import numpy as np

from service.stats import baseline as bl
from service.stats.thresholds import Thresholds, calibrate

WEEK_DAY_TYPES = (0, 0, 0, 0, 0, 1, 2)  # five weekdays, a Saturday, a Sunday (day-type codes)
MISSING_RATE_BOUNDS = (0.002, 0.5)  # share of scheduled intervals assumed unreported
# Days of history at which half the budget would be held back for estimation error
# (budget_spent); own choice, set so that 3 weeks of history spend about 0.7 of it.
ESTIMATION_ALLOWANCE_DAYS = 10.0


class TypicalWeek(NamedTuple):
    """The baseline's expectation over one typical week, interval by interval."""

    mu: np.ndarray  # expected vehicles per interval
    log_se: np.ndarray
    day_alpha: np.ndarray
    interval_alpha: np.ndarray


def typical_week(base: bl.Baseline) -> TypicalWeek:
    """Expected counts and dispersions for five weekdays, a Saturday and a Sunday."""
    bins = np.arange(base.bins_per_day)
    week = [base.expected_for(np.full(bins.size, code), bins) for code in WEEK_DAY_TYPES]
    mu, log_se, day_alpha, interval_alpha = (np.concatenate([w[i] for w in week])
                                             for i in range(4))
    return TypicalWeek(mu, log_se, day_alpha, interval_alpha)


def missing_rate(base: bl.Baseline) -> float:
    """Share of scheduled intervals that went unreported on the usable days of the fit.

    The observed intervals of those days are the used plus the trimmed ones (a trimmed day's
    intervals count as trimmed), so the schedule they are divided by covers the same days:
    every kept day of every day type (a pooled day type's ``days_used`` counts its own kept
    days) plus the days the robust fit trimmed. Days dropped for low completeness are in
    neither (about 24 intervals per DST day are ignored: a day counts ``bins_per_day``)."""
    kept_days = sum(p.days_used for p in base.profiles.values())
    scheduled = max(1, (kept_days + base.days_trimmed) * base.bins_per_day)
    return float(np.clip(1.0 - (base.intervals_used + base.intervals_trimmed) / scheduled,
                         *MISSING_RATE_BOUNDS))


def history_days(base: bl.Baseline) -> int:
    """Usable days that entered the fit (every day type's kept days)."""
    return int(sum(p.days_used for p in base.profiles.values()))


def budget_spent(false_alerts_per_week: float, days: float) -> float:
    """The part of the budget the plug-in calibration spends: ``F D / (D + D0)``, ``D`` the
    days of history and ``D0`` = :data:`ESTIMATION_ALLOWANCE_DAYS`.

    Thresholds computed from estimated parameters are exceeded more often than the model
    says (an estimate too small in one bin raises more alerts than one too large saves), the
    more so the shorter the history; the rest of the budget is the allowance for it. A
    simple correction, not a replay: measured on simulated detectors (five volume classes,
    gamma day factors, fitted and scored through ``fit_baseline`` and ``score_timeline``),
    the realised rate with 3 weeks of history was about 1.4 times the budget without it."""
    d = max(float(days), 0.0)
    return float(false_alerts_per_week) * d / (d + ESTIMATION_ALLOWANCE_DAYS)


def thresholds_for_baseline(base: bl.Baseline, *, interval_s: int,
                            false_alerts_per_week: float) -> Thresholds:
    """Every test's threshold for a detector's baseline, from the false-alert budget.

    ``interval_s`` is the detector's interval (seconds); ``false_alerts_per_week`` the budget
    per detector, of which :func:`budget_spent` is spent on the tests (the rest allows for
    estimation error); the returned ``false_alerts_per_week`` is the budget given, so that
    stored thresholds are recognised as made for it. About 0.1 s of CPU, so callers cache
    the result."""
    week = typical_week(base)
    th = calibrate(
        budget_spent(false_alerts_per_week, history_days(base)), interval_s=interval_s,
        mu_week=week.mu, interval_alpha=week.interval_alpha, day_alpha=week.day_alpha,
        log_se=week.log_se, missing_rate=missing_rate(base))
    return dataclasses.replace(th, false_alerts_per_week=float(false_alerts_per_week))
