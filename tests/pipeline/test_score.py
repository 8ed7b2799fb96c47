"""Scoring at the database edge: alerts from stored counts, whatever the arrival order."""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np
import pytest
from hypothesis import HealthCheck, given
from hypothesis import settings as hyp_settings
from hypothesis import strategies as st
from sqlalchemy import select

from service.config import Settings
from service.pipeline import fit, ingest, score
from service.store import scoring as store_scoring
from service.store import tables
from service.store.baselines import BaselineCache
from tests.factories import load_network, rfc3339, small_network

GROUP = ("bra3-nb-lt", "bra3-nb-t1", "bra3-nb-t2")
HOUR = 3600


def scoring_settings(database_url: str) -> Settings:
    return Settings(database_url=database_url, clock="data")


def prepared(engine, settings, net):  # type: ignore[no-untyped-def]
    """History stored and fitted as of the test start."""
    load_network(engine, net, until_s=net.test_start_s)
    results = fit.fit_many(settings, engine, as_of_s=net.test_start_s, workers=1)
    assert all(r["status"] == "fitted" for r in results), results


def period_rows(net, *, edit=None):  # type: ignore[no-untyped-def]
    """The test period's rows as (detector_id, start_s, count), optionally edited."""
    ids = [d.detector_id for d in net.detectors]
    keep = net.start_s >= net.test_start_s
    rows = [[ids[int(d)], int(t), int(c)] for d, t, c in
            zip(net.detector_index[keep], net.start_s[keep], net.count[keep], strict=True)]
    if edit is not None:
        rows = [r for r in (edit(r) for r in rows) if r is not None]
    return rows


def post(engine, rows, *, batch=5000):  # type: ignore[no-untyped-def]
    for lo in range(0, len(rows), batch):
        items = [(i, d, rfc3339(datetime.fromtimestamp(t, UTC)), c)
                 for i, (d, t, c) in enumerate(rows[lo : lo + batch])]
        ingest.ingest_items(engine, items, future_tolerance_s=10**9,
                            after_store=store_scoring.mark_dirty)


def visible_alerts(engine) -> set[tuple]:  # type: ignore[no-untyped-def]
    a = tables.alerts
    with engine.connect() as conn:
        rows = conn.execute(select(a.c.subject, a.c.kind, a.c.start_s, a.c.end_s, a.c.status,
                                   a.c.cause, a.c.n_intervals).where(
            a.c.withdrawn == 0, a.c.part_of.is_(None))).all()
    return {tuple(r) for r in rows}


@pytest.fixture(scope="module")
def network():  # type: ignore[no-untyped-def]
    return small_network(GROUP, history_days=21, test_days=2, seed=3)


def dead_at_peak(net, det="bra3-nb-t1"):  # type: ignore[no-untyped-def]
    """Zeros on one detector from 07:00 to 09:00 local on the first test day."""
    lo = net.test_start_s + 7 * HOUR
    hi = lo + 2 * HOUR

    def edit(r):  # type: ignore[no-untyped-def]
        if r[0] == det and lo <= r[1] < hi:
            return [r[0], r[1], 0]
        return r

    return edit, lo, hi


@pytest.mark.slow
def test_dead_detector_at_peak_raises_one_detector_alert(database_url, engine, network) -> None:
    """A lane stuck at zero through the morning peak: one zero_counts alert, cause detector,
    raised within 30 minutes, closed once counts return."""
    settings = scoring_settings(database_url)
    prepared(engine, settings, network)
    edit, lo, hi = dead_at_peak(network)
    post(engine, period_rows(network, edit=edit))
    score.score_until_idle(engine, settings)
    alerts = [a for a in visible_alerts(engine) if a[0] == "bra3-nb-t1" and a[1] == "zero_counts"]
    assert len(alerts) == 1, visible_alerts(engine)
    subject, kind, start, end, status, cause, n = alerts[0]
    assert cause == "detector" and status == "closed"
    assert lo <= start <= lo + 30 * 60
    assert hi - 30 * 60 <= end < hi


@pytest.mark.slow
def test_alerts_do_not_depend_on_arrival_order(database_url, engine, network, tmp_path) -> None:
    """The same counts fed in time order in one go, or shuffled in small batches with
    duplicates and scoring between batches, give the same alerts."""
    settings = scoring_settings(database_url)
    prepared(engine, settings, network)
    edit, _, _ = dead_at_peak(network)
    rows = period_rows(network, edit=edit)
    post(engine, rows)
    score.score_until_idle(engine, settings)
    expected = visible_alerts(engine)
    assert expected

    from tests.conftest import _truncate

    if database_url.startswith("postgresql"):
        _truncate(database_url)
    else:
        with engine.begin() as conn:
            for t in ("alerts", "evidence", "detector_state", "baselines", "counts",
                      "count_conflicts", "detectors"):
                conn.exec_driver_sql(f"DELETE FROM {t}")
            conn.exec_driver_sql("UPDATE counters SET value = 0")
    prepared(engine, settings, network)
    rng = np.random.default_rng(5)
    order = rng.permutation(len(rows))
    shuffled = [rows[i] for i in order] + [rows[i] for i in order[:300]]
    for lo in range(0, len(shuffled), 700):
        post(engine, shuffled[lo : lo + 700])
        score.score_until_idle(engine, settings)
    assert visible_alerts(engine) == expected


@pytest.fixture(scope="module")
def prepared_template(tmp_path_factory, sqlite_template, network):  # type: ignore[no-untyped-def]
    """A SQLite file with the history stored and fitted, and the alerts that the test period
    (with a dead detector) gives when fed in time order in one go."""
    import shutil

    from service.store.engine import make_engine

    folder = tmp_path_factory.mktemp("prepared")
    template = folder / "prepared.db"
    shutil.copy(sqlite_template, template)
    settings = scoring_settings(f"sqlite:///{template}")
    engine = make_engine(settings)
    prepared(engine, settings, network)
    engine.dispose()
    scored = folder / "scored.db"
    shutil.copy(template, scored)
    engine = make_engine(scoring_settings(f"sqlite:///{scored}"))
    edit, _, _ = dead_at_peak(network)
    post(engine, period_rows(network, edit=edit))
    score.score_until_idle(engine, scoring_settings(f"sqlite:///{scored}"))
    expected = visible_alerts(engine)
    engine.dispose()
    assert any(a[1] == "zero_counts" for a in expected), expected
    return template, expected


@hyp_settings(max_examples=5, deadline=None,
              suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(batch=st.integers(50, 3000), every=st.integers(0, 3), reverse=st.booleans(),
       seed=st.integers(0, 2**16))
def test_batching_never_changes_alerts_property(prepared_template, network, batch, every,
                                                reverse, seed) -> None:
    """Property: any batch size, any order, duplicates, and scoring at any point between
    batches give the same alerts as one in-order feed."""
    import shutil
    import tempfile
    from pathlib import Path

    from service.store.engine import make_engine

    template, expected = prepared_template
    edit, _, _ = dead_at_peak(network)
    rows = period_rows(network, edit=edit)
    rng = np.random.default_rng(seed)
    if reverse:
        rows = rows[::-1]
    else:  # local shuffles: late and out-of-order intervals
        rows = [rows[i] for i in np.argsort(np.arange(len(rows)) + rng.integers(0, 400, len(rows)))]
    rows = rows + [rows[i] for i in rng.integers(0, len(rows), 200)]
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "t.db"
        shutil.copy(template, path)
        settings = scoring_settings(f"sqlite:///{path}")
        engine = make_engine(settings)
        for i, lo in enumerate(range(0, len(rows), batch)):
            post(engine, rows[lo : lo + batch], batch=batch)
            if every and i % every == 0:
                score.score_until_idle(engine, settings)
        score.score_until_idle(engine, settings)
        got = visible_alerts(engine)
        engine.dispose()
    assert got == expected


def test_group_offline_raises_one_communications_alert(database_url, engine, network) -> None:
    """All three detectors of a group silent for an hour: one group alert, cause
    communications, and no per-detector alerts on view."""
    settings = scoring_settings(database_url)
    prepared(engine, settings, network)
    lo = network.test_start_s + 10 * HOUR
    hi = lo + HOUR
    post(engine, period_rows(network, edit=lambda r: None if lo <= r[1] < hi else r))
    score.score_until_idle(engine, settings)
    shown = [a for a in visible_alerts(engine) if a[1] == "no_reports"]
    assert len(shown) == 1, visible_alerts(engine)
    subject, kind, start, end, status, cause, n = shown[0]
    assert subject == "group:bra3-nb" and cause == "communications"
    assert lo <= start <= lo + 30 * 60 and status == "closed"


@pytest.mark.slow
def test_lone_missing_interval_raises_nothing(database_url, engine, network) -> None:
    """One interval missing in steady reporting is ragged data, not an alert."""
    settings = scoring_settings(database_url)
    prepared(engine, settings, network)
    gap = network.test_start_s + 12 * HOUR
    post(engine, period_rows(network, edit=lambda r: None if r[1] == gap and r[0] == GROUP[0] else r))
    score.score_until_idle(engine, settings)
    assert not [a for a in visible_alerts(engine) if a[1] == "no_reports"]


@pytest.mark.slow
def test_incident_on_whole_group_is_traffic(database_url, engine, network) -> None:
    """Every detector of the approach drops to a fifth for 45 minutes at midday: the drop is
    told as traffic: one group alert for the approach (a shift most members show together),
    or member alerts, every one with cause traffic."""
    settings = scoring_settings(database_url)
    prepared(engine, settings, network)
    lo = network.test_start_s + 11 * HOUR
    hi = lo + 45 * 60
    rng = np.random.default_rng(1)

    def edit(r):  # type: ignore[no-untyped-def]
        if lo <= r[1] < hi:
            return [r[0], r[1], int(rng.binomial(r[2], 0.2))]
        return r

    post(engine, period_rows(network, edit=edit))
    score.score_until_idle(engine, settings)
    low = [a for a in visible_alerts(engine) if a[1] in ("low_volume", "zero_counts")
           and a[2] < hi and a[3] >= lo]
    subjects = {a[0] for a in low}
    assert any(s.startswith("group:") for s in subjects) or len(subjects) >= 2, \
        visible_alerts(engine)
    assert all(a[5] == "traffic" for a in low), low


def test_baseline_cache_keeps_what_it_read_until_its_owner_drops_it(database_url, engine,
                                                                    network) -> None:
    """A cache returns the baseline and thresholds it read even after the stored row changes;
    a new cache (a new scorer) reads the row afresh. Thresholds are found only for the budget
    they were derived for."""
    settings = scoring_settings(database_url)
    prepared(engine, settings, network)
    b = tables.baselines
    cache = BaselineCache()
    budget = settings.false_alerts_per_week
    with engine.connect() as conn:
        baseline_id = conn.execute(select(b.c.baseline_id)
                                   .where(b.c.detector_id == GROUP[0])).scalar_one()
        base = cache.baseline(conn, baseline_id)
        thresholds = cache.thresholds(conn, baseline_id, budget)
        assert thresholds is not None and thresholds.false_alerts_per_week == budget
        assert cache.thresholds(conn, baseline_id, budget * 2) is None
    with engine.begin() as conn:
        conn.execute(b.update().where(b.c.baseline_id == baseline_id)
                     .values(model='{"torn": 1}', thresholds=None))
    with engine.connect() as conn:
        assert cache.baseline(conn, baseline_id) is base
        assert cache.thresholds(conn, baseline_id, budget) is thresholds
        fresh = BaselineCache()
        with pytest.raises(KeyError):
            fresh.baseline(conn, baseline_id)
        assert fresh.thresholds(conn, baseline_id, budget) is None
        cache.clear()
        assert cache.thresholds(conn, baseline_id, budget) is None
