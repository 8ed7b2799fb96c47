"""Group outage alerts: they close only when the group's silent members have reported again,
never flap closed-open, and the members' health agrees with the alert list."""

from __future__ import annotations

import pytest
from sqlalchemy import select

from service.config import Settings
from service.pipeline import score
from service.store import alerts as alert_store
from service.store import tables
from tests.factories import small_network
from tests.pipeline.test_score import HOUR, period_rows, post, prepared

GROUP = ("orx-eb-s1", "orx-eb-s2", "orx-eb-s3", "orx-eb-s4")  # 4 stations, 5-min intervals
PACER = "bra3-nb-t1"  # another group's detector: it keeps reporting, so the data clock moves
STEP = 300


@pytest.fixture(scope="module")
def network():  # type: ignore[no-untyped-def]
    return small_network((*GROUP, PACER), history_days=21, test_days=2, seed=5)


def group_alerts(engine) -> list:  # type: ignore[no-untyped-def]
    a = tables.alerts
    with engine.connect() as conn:
        return list(conn.execute(select(a).where(a.c.subject == "group:orx-eb",
                                                 a.c.withdrawn == 0)).all())


def listed_open(engine) -> set[int]:  # type: ignore[no-untyped-def]
    page = alert_store.poll(engine, after=0, status="open", detector_id=None, group=None,
                            kind=None, limit=1000, query="", if_none_match=None).page
    assert page is not None
    return {a["id"] for a in page["data"]}


def health_open(engine, detector_id: str) -> set[int]:  # type: ignore[no-untyped-def]
    figures = alert_store.detector_health(engine, detector_id, clock=lambda conn: 0.0)
    return {a["id"] for a in figures["open_alerts"]}


def test_one_interval_from_one_member_does_not_close_a_group_outage(database_url, engine,
                                                                     network) -> None:
    """Regression (the orx-eb flap): 4 detectors of a group silent for an hour; one posts a
    single interval and falls silent again. The group alert stays open (never closed and
    reopened) while the other three are silent, every member's health names exactly the open
    alerts the list shows, and the alert closes once the members report again."""
    settings = Settings(database_url=database_url, clock="data")
    prepared(engine, settings, network)
    rows = period_rows(network)
    t0 = network.test_start_s + 10 * HOUR  # the group falls silent
    t1 = t0 + HOUR  # orx-eb-s1 posts one interval
    t2 = t1 + HOUR  # everyone reports again

    def upto(lo: int, hi: int, *, silent: bool) -> list:  # type: ignore[type-arg]
        return [r for r in rows if lo <= r[1] < hi and (r[0] == PACER or not silent
                                                         or r[1] == t1 and r[0] == GROUP[0])]

    post(engine, [r for r in rows if r[1] < t0])
    score.score_until_idle(engine, settings)
    assert not group_alerts(engine)
    # An hour of silence, fed a quarter hour at a time as a live feed would be.
    for lo in range(t0, t1, 900):
        post(engine, upto(lo, lo + 900, silent=True))
        score.score_until_idle(engine, settings)
    (outage,) = group_alerts(engine)
    assert outage.status == "open" and t0 <= outage.start_s <= t0 + 30 * 60
    # One interval from one member, then the pacer's next intervals a few at a time: after each
    # pass the alert is still open, listed, and the members' health agrees with the list.
    seen_status = []
    for lo in range(t1, t1 + 45 * 60, STEP):
        post(engine, upto(lo, lo + STEP, silent=True))
        score.score_until_idle(engine, settings)
        (now,) = group_alerts(engine)
        seen_status.append(now.status)
        listed = listed_open(engine)
        assert now.alert_id in listed
        for member in GROUP:
            shown = health_open(engine, member)
            assert outage.alert_id in shown, (member, shown)
            assert shown <= listed, (member, shown - listed)
    assert seen_status == ["open"] * len(seen_status)
    assert now.alert_id == outage.alert_id and now.start_s == outage.start_s
    # The rest of the silence, then everyone reports again: closed once, at the return.
    post(engine, upto(t1 + 45 * 60, t2, silent=True))
    post(engine, upto(t2, t2 + 2 * HOUR, silent=False))
    score.score_until_idle(engine, settings)
    (done,) = group_alerts(engine)
    assert done.alert_id == outage.alert_id and done.status == "closed"
    assert done.closed_s == t2
    for member in GROUP:
        assert not health_open(engine, member)
    assert not listed_open(engine) & {done.alert_id}


@pytest.mark.slow
def test_member_still_silent_after_group_outage_is_shown(database_url, engine, network) -> None:
    """Three of four members report again and one stays silent: the group alert closes and
    the silent member's own alert, still open, is listed (not hidden as part of the group)
    and named by its health."""
    settings = Settings(database_url=database_url, clock="data")
    prepared(engine, settings, network)
    rows = period_rows(network)
    t0 = network.test_start_s + 10 * HOUR
    t2 = t0 + HOUR
    post(engine, [r for r in rows if r[1] < t0])
    post(engine, [r for r in rows if t0 <= r[1] < t2 and r[0] == PACER])
    post(engine, [r for r in rows if t2 <= r[1] < t2 + 2 * HOUR and r[0] != GROUP[3]])
    score.score_until_idle(engine, settings)
    (outage,) = group_alerts(engine)
    assert outage.status == "closed" and outage.closed_s == t2
    a = tables.alerts
    with engine.connect() as conn:
        own = conn.execute(select(a).where(a.c.detector_id == GROUP[3], a.c.kind == "no_reports",
                                           a.c.withdrawn == 0)).one()
    assert own.status == "open" and own.part_of is None
    assert own.alert_id in listed_open(engine)
    assert health_open(engine, GROUP[3]) == {own.alert_id}
    for member in GROUP[:3]:
        assert not health_open(engine, member)
