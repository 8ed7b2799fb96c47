"""Specifications of the partial pooling of dispersion across the detectors of a group
(``baseline.pool_group_dispersion``): a short history borrows from its group, a long one keeps
its own value, the day level keeps its floor."""

from __future__ import annotations

import numpy as np
import pytest

from service.stats import baseline as bl
from service.stats.calendar import DAY_TYPES

BINS = 288
# days of history per day type: 8 weeks and 3 weeks
LONG = {"weekday": 40, "saturday": 8, "sunday_holiday": 8}
SHORT = {"weekday": 15, "saturday": 3, "sunday_holiday": 3}


def _baseline(days: dict[str, int], day_alpha: float, interval_alpha: float,
              interval_s: int = 300) -> bl.Baseline:
    profiles = {}
    for name in DAY_TYPES:
        profiles[name] = bl.DayTypeProfile(
            day_type=name, fitted_from=name, expected=np.full(BINS, 10.0),
            log_se=np.full(BINS, 0.05), day_alpha=day_alpha, interval_alpha=interval_alpha,
            distribution="negative_binomial", dispersion_p_value=1e-6,
            days_used=days[name], smoothing={"effective_days": float(days[name])})
    return bl.Baseline(interval_s=interval_s, bins_per_day=BINS, profiles=profiles,
                       window_start_s=0, window_end_s=56 * 86_400, intervals_used=1,
                       intervals_trimmed=0, days_dropped=0)


def _moved(before: float, after: float, target: float) -> float:
    """Share of the way from ``before`` to ``target`` that ``after`` went."""
    return (after - before) / (target - before)


def test_a_short_history_moves_toward_its_group_and_a_long_one_barely_moves():
    """Three lanes with 8 weeks (56 days) at day_alpha 0.02 to 0.03 and one with 3 weeks (21
    days) whose estimates came out at 0.06: the short one moves 30 % of the way or more toward
    the group's value; a long one moves less than half as far (in share of its own distance
    to the group's value) and by under 0.002 in absolute terms."""
    group = [_baseline(LONG, 0.02, 0.03), _baseline(LONG, 0.03, 0.03),
             _baseline(LONG, 0.02, 0.03), _baseline(SHORT, 0.06, 0.03)]
    pooled = bl.pool_group_dispersion(group)
    for name in DAY_TYPES:
        g = pooled[0].profiles[name].smoothing["group_day_alpha"]
        short_before = group[3].profiles[name].day_alpha
        short_after = pooled[3].profiles[name].day_alpha
        long_before = group[1].profiles[name].day_alpha
        long_after = pooled[1].profiles[name].day_alpha
        assert 0.02 < g < 0.04
        short_share = _moved(short_before, short_after, g)
        long_share = _moved(long_before, long_after, g)
        assert short_share >= 0.3, (name, short_share)
        assert 0 < long_share < short_share / 2, (name, long_share, short_share)
        assert abs(long_after - long_before) < 0.002, name
    # the day level of an own profile stays in its log_se (day_alpha / effective days)
    before = group[3].profiles["weekday"]
    after = pooled[3].profiles["weekday"]
    assert after.log_se[0] ** 2 == pytest.approx(
        before.log_se[0] ** 2 + (after.day_alpha - before.day_alpha) / 15.0)
    assert after.smoothing["day_alpha_own"] == 0.06


def test_the_floor_holds_and_lone_or_mixed_interval_detectors_are_unchanged():
    """A group whose lanes all estimate a day-level variance below the floor stays on the
    floor; a group of one, or baselines of different interval lengths, are returned as is."""
    low = [_baseline(LONG, bl.LEVEL_VAR_FLOOR, 0.0), _baseline(SHORT, bl.LEVEL_VAR_FLOOR, 0.0)]
    for b in bl.pool_group_dispersion(low):
        for p in b.profiles.values():
            assert p.day_alpha >= bl.LEVEL_VAR_FLOOR
            assert p.interval_alpha == 0.0
    lone = _baseline(SHORT, 0.06, 0.03)
    assert bl.pool_group_dispersion([lone])[0] is lone
    mixed = [_baseline(LONG, 0.02, 0.03), _baseline(SHORT, 0.06, 0.03, interval_s=900)]
    assert all(a is b for a, b in zip(bl.pool_group_dispersion(mixed), mixed, strict=True))


def test_pooled_baselines_round_trip_and_expect_their_new_values():
    """The pooled baselines are ordinary baselines: stored as JSON and read back equal,
    ``expected_for`` serves the pooled alphas, and ``own_dispersion`` gives back the values
    before pooling."""
    pooled = bl.pool_group_dispersion([_baseline(LONG, 0.02, 0.03),
                                       _baseline(SHORT, 0.06, 0.05)])
    again = bl.Baseline.from_dict(pooled[1].to_dict())
    assert again.profiles["weekday"].day_alpha == pooled[1].profiles["weekday"].day_alpha
    exp = pooled[1].expected_for([0], [0])
    assert float(exp.day_alpha[0]) == pytest.approx(pooled[1].profiles["weekday"].day_alpha)
    assert float(exp.interval_alpha[0]) < 0.05
    own = bl.own_dispersion(again)  # what a stored group mate contributes to a later refit
    assert own.profiles["weekday"].day_alpha == 0.06
    assert own.profiles["weekday"].interval_alpha == 0.05
    unpooled = _baseline(SHORT, 0.06, 0.05)
    assert bl.own_dispersion(unpooled) is unpooled
