"""Rolling refits on the data clock: a nightly refit replaces a baseline while scoring goes on,
and a new detector learns until it has its first week of history, then is scored.

The clock is the data clock (``TALLYWARD_CLOCK=data``): posting counts moves it, so a test
walks through days and nights by posting them, and the worker's tasks run in this process
(``Worker.run_until_idle``) on a real SQLite file and on PostgreSQL.
"""

from __future__ import annotations

from datetime import UTC, datetime

import pytest
from sqlalchemy import select

from service.config import Settings
from service.pipeline import fit as fitting
from service.pipeline import ingest
from service.pipeline.jobs import last_refit_moment, next_refit_moment
from service.pipeline.score import mark_dirty
from service.pipeline.worker import Worker, default_tasks
from service.store import tables
from service.store.engine import make_engine, read_transaction
from service.store.jobs import fit_state
from service.store.scoring import clock_now
from tests.factories import load_network, small_network

DET = "bra3-nb-t1"
HOUR_S = 3600
DAY_S = 86_400


def post(engine, net, lo: int, hi: int, *, dead: tuple[int, int] | None = None) -> None:  # type: ignore[no-untyped-def]
    """Store the network's counts with lo <= start < hi as ingest does (scoring is queued);
    the detector DET counts 0 inside ``dead``."""
    ids = [d.detector_id for d in net.detectors]
    keep = (net.start_s >= lo) & (net.start_s < hi)
    items = []
    for d, t, c in zip(net.detector_index[keep], net.start_s[keep], net.count[keep],
                       strict=True):
        count = int(c)
        if dead and ids[int(d)] == DET and dead[0] <= t < dead[1]:
            count = 0
        items.append((len(items), ids[int(d)],
                      datetime.fromtimestamp(int(t), UTC).strftime("%Y-%m-%dT%H:%M:%SZ"), count))
    for i in range(0, len(items), 5000):
        ingest.ingest_items(engine, items[i:i + 5000], future_tolerance_s=10**9,
                            after_store=mark_dirty)


def state(engine, detector_id: str = DET):  # type: ignore[no-untyped-def]
    s = tables.detector_state
    with read_transaction(engine) as conn:
        return conn.execute(select(s).where(s.c.detector_id == detector_id)).first()


def alerts_of(engine, detector_id: str = DET) -> list:  # type: ignore[no-untyped-def]
    a = tables.alerts
    with read_transaction(engine) as conn:
        return conn.execute(select(a).where(a.c.detector_id == detector_id, a.c.part_of.is_(None))
                            .order_by(a.c.start_s)).all()


def test_refit_moments_follow_the_detectors_local_hour() -> None:
    """The nightly moment is the refit hour on the detector's own wall clock, across a DST
    change (America/Chicago: 2026-11-01 has 25 hours)."""
    tz = "America/Chicago"
    clock = int(datetime(2026, 11, 1, 12, 0, tzinfo=UTC).timestamp())  # 06:00 CST local
    last = last_refit_moment(clock, tz, 2)
    assert datetime.fromtimestamp(last, UTC) == datetime(2026, 11, 1, 8, 0, tzinfo=UTC)  # 02:00 CST
    nxt = next_refit_moment(clock, tz, 2)
    assert datetime.fromtimestamp(nxt, UTC) == datetime(2026, 11, 2, 8, 0, tzinfo=UTC)
    before = last_refit_moment(clock, tz, 7)  # 07:00 local has not come yet: the day before
    assert datetime.fromtimestamp(before, UTC) == datetime(2026, 10, 31, 12, 0, tzinfo=UTC)  # CDT
    assert last_refit_moment(nxt, tz, 2) == nxt  # the moment itself is due


def test_nightly_refit_replaces_the_baseline_while_scoring_continues(database_url) -> None:
    """At the refit hour a new baseline, fitted on the latest window, takes over from the old
    one; intervals before the refit were judged by the old baseline and those after by the
    new one, and scoring carried on without a gap or a restart."""
    settings = Settings(database_url=database_url, clock="data", refits="nightly",
                        refit_hour=12)
    engine = make_engine(settings)
    try:
        net = small_network(("bra3-nb-lt", DET), history_days=14, test_days=2, seed=5)
        day0 = net.test_start_s  # local midnight
        load_network(engine, net, until_s=day0)
        fitting.fit_many(settings, engine, as_of_s=day0, workers=1)
        old = state(engine).baseline_id
        worker = Worker(default_tasks(engine, settings, refits=True))

        # Morning: the detector dies for 90 minutes at 08:00 local; the clock stops at 11:00.
        post(engine, net, day0, day0 + 11 * HOUR_S, dead=(day0 + 8 * HOUR_S, day0 + 9.5 * HOUR_S))
        worker.run_until_idle()
        before = state(engine)
        assert before.baseline_id == old, "no refit before the refit hour"
        morning = [a for a in alerts_of(engine) if a.kind == "zero_counts"]
        assert len(morning) == 1 and morning[0].baseline_id == old

        # Past noon (the refit hour): the refit runs on the latest window.
        post(engine, net, day0 + 11 * HOUR_S, day0 + 12 * HOUR_S + 300)
        worker.run_until_idle()
        after = state(engine)
        assert after.baseline_id != old
        b = tables.baselines
        with read_transaction(engine) as conn:
            new_as_of = conn.execute(select(b.c.as_of_s).where(
                b.c.baseline_id == after.baseline_id)).scalar_one()
            clock = clock_now(conn, settings)
        assert new_as_of == int(clock) + 1 >= day0 + 12 * HOUR_S
        # Scoring went on through the refit: same start, no restart, scored up to the clock.
        assert after.score_from_s == before.score_from_s
        assert after.scored_through_s >= before.scored_through_s
        assert after.scored_through_s == day0 + 12 * HOUR_S + 300
        assert morning[0].alert_id in {a.alert_id for a in alerts_of(engine)}

        # Afternoon: dead again from 14:00; the new baseline judges it.
        post(engine, net, day0 + 12 * HOUR_S + 300, day0 + 17 * HOUR_S,
             dead=(day0 + 14 * HOUR_S, day0 + 16 * HOUR_S))
        worker.run_until_idle()
        afternoon = [a for a in alerts_of(engine) if a.kind == "zero_counts"
                     and a.start_s >= day0 + 14 * HOUR_S]
        assert len(afternoon) == 1 and afternoon[0].baseline_id == after.baseline_id
        assert state(engine).baseline_id == after.baseline_id, "one refit a night"
        r = tables.refits
        with read_transaction(engine) as conn:
            due = conn.execute(select(r.c.due_s).where(r.c.detector_id == DET)).scalar_one()
        assert due == day0 + DAY_S + 12 * HOUR_S  # tomorrow noon, local
    finally:
        engine.dispose()


def test_new_detector_learns_for_seven_days_then_is_scored(database_url) -> None:
    """A new detector is 'learning' with the days still needed until its history spans seven
    days; the worker then fits it at once and scores what follows."""
    settings = Settings(database_url=database_url, clock="data", refits="nightly")
    engine = make_engine(settings)
    try:
        net = small_network((DET,), history_days=7, test_days=1, seed=9)
        from service.store import detectors as registry
        from service.tools import simulate

        registry.import_feature_collection(engine, simulate.detectors_geojson(net))
        first = int(net.start_s.min())
        worker = Worker(default_tasks(engine, settings, refits=True))

        def fit_now() -> dict:
            with read_transaction(engine) as conn:
                return fit_state(conn, DET, first_fit_days=settings.first_fit_days)

        for day, needed in ((1, 6), (4, 3), (6, 1)):
            post(engine, net, first + (day - 1) * DAY_S, first + day * DAY_S)
            worker.run_until_idle()
            fs = fit_now()
            assert (fs["state"], fs["days_needed"]) == ("learning", needed), (day, fs)
            assert state(engine) is None, "no baseline while learning"
        # The seventh day completes seven days of history: fitted at once, as of its end.
        post(engine, net, first + 6 * DAY_S, first + 7 * DAY_S)
        worker.run_until_idle()
        fs = fit_now()
        assert fs["state"] == "scored" and fs["days_needed"] == 0 and fs["baseline_id"]
        st = state(engine)
        assert st.baseline_id == fs["baseline_id"] and st.score_from_s == first + 7 * DAY_S - 299
        # The eighth day is scored with it.
        post(engine, net, first + 7 * DAY_S, first + 8 * DAY_S)
        worker.run_until_idle()
        assert state(engine).scored_through_s == first + 8 * DAY_S
    finally:
        engine.dispose()


@pytest.mark.parametrize("refits", ["auto", "off"])
def test_inline_runner_does_not_refit_unless_asked(database_url, refits) -> None:
    """`tallyward serve` (inline) leaves baselines alone unless TALLYWARD_REFITS=nightly:
    a replay of history keeps the baseline it was given."""
    from service.pipeline.worker import refits_enabled

    settings = Settings(database_url=database_url, refits=refits)
    assert not refits_enabled(settings, in_worker=False)
    assert refits_enabled(settings, in_worker=True) is (refits == "auto")
    assert [t.name for t in default_tasks(None, settings, refits=False)] == ["score", "fit_jobs"]



