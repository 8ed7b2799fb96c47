"""The optional network-wide cap on expected false alerts per day."""

from __future__ import annotations

import math

import orjson
import pytest
from sqlalchemy import select

from service.config import Settings
from service.pipeline import score
from service.store import tables
from tests.factories import small_network
from tests.pipeline.test_score import GROUP, period_rows, post, prepared


@pytest.mark.parametrize(("cap", "n", "expected"), [
    (None, 1000, 0.05),  # no cap: the per-detector budget
    (1.0, 1000, 7.0 / 1024),  # 1 a day over 1,000 detectors (rounded up to 1,024)
    (1.0, 3, 0.05),  # a cap looser than the per-detector budget changes nothing
    (0.01, 3, 0.07 / 4),
])
def test_detector_budget_shares_the_network_cap(cap, n, expected) -> None:
    """With a network cap C a day, each of N detectors gets at most 7 C / N' a week (N' = N
    rounded up to a power of two), never more than the per-detector budget."""
    settings = Settings(network_false_alerts_per_day=cap)
    budget = score.detector_budget(settings, n)
    assert math.isclose(budget, expected)
    if cap is not None:
        assert n * budget / 7.0 <= cap + 1e-12


@pytest.mark.slow
def test_scoring_derives_thresholds_for_the_network_share(database_url, engine) -> None:
    """Scoring under a network cap stores thresholds derived for each detector's share of it."""
    net = small_network(GROUP, history_days=14, test_days=1, seed=3)
    settings = Settings(database_url=database_url, clock="data",
                        network_false_alerts_per_day=0.01)
    prepared(engine, settings, net)
    post(engine, period_rows(net))
    score.score_until_idle(engine, settings)
    b = tables.baselines
    with engine.connect() as conn:
        stored = [orjson.loads(t) for t in conn.execute(select(b.c.thresholds)).scalars()]
    assert len(stored) == len(GROUP)
    for th in stored:
        assert math.isclose(th["false_alerts_per_week"], 0.07 / 4)
