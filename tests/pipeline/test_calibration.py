"""The false-alert budget, measured through the real pipeline on traffic outside the model class.

Normal traffic with a gamma day factor, hour-to-hour correlated lognormal swings and 1 % of
intervals missing at random, five volume classes down to about 2 vehicles per 5-minute peak,
no faults (``service.tools.calibration``). The history is stored in a SQLite file, fitted with
``fit_many`` and the following weeks are ingested and scored on the data clock; every alert is
false. This is an outside check of the scorer's calibration with estimated parameters, not of
the baseline against its own simulator.

Each test asserts on a one-sided exact Poisson bound (Garwood 1936): it fails only when the 99 %
lower confidence bound of the false-alert rate exceeds the limit. Were the true rate exactly at
the limit, a seed would fail with probability at most 1 %; at the budget itself, below 1e-4.
"""

from __future__ import annotations

import pytest

from service.tools import calibration

BUDGET = 0.05  # the default false alerts per detector-week
CONFIDENCE = 0.99
PER_CLASS = 6
SCORED_WEEKS = 3
TRAFFIC = calibration.Traffic(swing_sd=0.12, swing_phi=0.7, missing=0.01)


def _run(url: str, history_weeks: int) -> calibration.Calibration:
    return calibration.run(url, per_class=PER_CLASS, history_weeks=history_weeks,
                           scored_weeks=SCORED_WEEKS, traffic=TRAFFIC, seed=20260601,
                           budget=BUDGET, workers=2)


@pytest.mark.slow
def test_false_alerts_within_twice_the_budget_with_eight_weeks_of_history(sqlite_url) -> None:
    """With 8 weeks of history, false alerts stay within 2x the budget (99 % lower bound), and
    the served 95 % band covers 93-97 % of the scored counts, every class within 90-98 %."""
    cal = _run(sqlite_url, 8)
    report = calibration.table(cal)
    assert cal.overall.lower_rate(CONFIDENCE) <= 2 * BUDGET, report
    assert 0.93 <= cal.overall.coverage <= 0.97, report
    for fig in cal.per_class:
        assert 0.90 <= fig.coverage <= 0.98, report


@pytest.mark.slow
def test_false_alerts_within_three_times_the_budget_with_three_weeks_of_history(
        sqlite_url) -> None:
    """With only 3 weeks of history, false alerts stay within 3x the budget (99 % lower
    bound)."""
    cal = _run(sqlite_url, 3)
    assert cal.overall.lower_rate(CONFIDENCE) <= 3 * BUDGET, calibration.table(cal)
