"""A fitted baseline's scoring thresholds: its typical week and missing rate, calibrated to a
false-alert budget.

Pure numpy: the calibration itself is ``service.stats.thresholds.calibrate``; this
module only turns one ``Baseline`` into what the calibration needs.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from service.stats import baseline as bl
from service.stats.thresholds import Thresholds, calibrate

WEEK_DAY_TYPES = (0, 0, 0, 0, 0, 1, 2)  # five weekdays, a Saturday, a Sunday (day-type codes)
MISSING_RATE_BOUNDS = (0.002, 0.5)  # share of scheduled intervals assumed unreported


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


def thresholds_for_baseline(base: bl.Baseline, *, interval_s: int,
                            false_alerts_per_week: float) -> Thresholds:
    """Every test's threshold for a detector's baseline, from the false-alert budget.

    ``interval_s`` is the detector's interval (seconds); ``false_alerts_per_week`` the budget
    per detector. Markov-chain CUSUM limits: about a second of CPU, so callers cache the
    result."""
    week = typical_week(base)
    return calibrate(
        false_alerts_per_week, interval_s=interval_s, mu_week=week.mu,
        interval_alpha=week.interval_alpha, day_alpha=week.day_alpha, log_se=week.log_se,
        missing_rate=missing_rate(base))
