"""Shifts most of a group shows together are one traffic event for the group."""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest
from sqlalchemy import select

from service.pipeline import score
from service.store import tables
from tests.factories import small_network
from tests.pipeline.test_score import period_rows, post, prepared, scoring_settings

GROUPS = {
    "bra3-nb": ("bra3-nb-lt", "bra3-nb-t1", "bra3-nb-t2"),
    "kfw-nb-031": ("kfw-nb-031-l1", "kfw-nb-031-l2", "kfw-nb-031-l3"),
}
DAY_S = 86_400


def unlisted_holiday(net, share: float, seed: int = 11):  # type: ignore[no-untyped-def]
    """Every detector of the network carries ``share`` of its traffic all through the first
    test day (a Monday the holiday calendar does not know), thinned binomially."""
    rng = np.random.default_rng(seed)
    lo, hi = net.test_start_s, net.test_start_s + DAY_S

    def edit(r):  # type: ignore[no-untyped-def]
        if lo <= r[1] < hi:
            return [r[0], r[1], int(rng.binomial(r[2], share))]
        return r

    return edit


def live_alerts(engine):  # type: ignore[no-untyped-def]
    a = tables.alerts
    with engine.connect() as conn:
        return conn.execute(select(a.c.subject, a.c.detector_id, a.c.group_id, a.c.kind,
                                   a.c.cause, a.c.part_of, a.c.start_s, a.c.end_s).where(
            a.c.withdrawn == 0)).all()


@pytest.mark.slow
def test_unlisted_holiday_is_one_traffic_alert_per_group(database_url, engine) -> None:
    """A network-wide drop to 55 % of normal traffic for a whole day (an unlisted holiday)
    shows at most one visible alert per group, each caused by traffic, none a repeated value;
    the members' own alerts are folded into their group's alert."""
    net = small_network(tuple(d for ds in GROUPS.values() for d in ds), history_days=21,
                        test_days=1, seed=5)
    settings = scoring_settings(database_url)
    prepared(engine, settings, net)
    post(engine, period_rows(net, edit=unlisted_holiday(net, 0.55)))
    score.score_until_idle(engine, settings)
    alerts = live_alerts(engine)
    visible = [a for a in alerts if a.part_of is None]
    assert visible, "a 45 % drop all day long must be seen"
    per_group = Counter(a.group_id for a in visible)
    assert all(n <= 1 for n in per_group.values()), visible
    assert all(a.cause == "traffic" for a in visible), visible
    assert not [a for a in alerts if a.kind == "repeated_value"], alerts
    group_ids = {a.subject for a in visible}
    assert group_ids <= {f"group:{g}" for g in GROUPS}, visible
