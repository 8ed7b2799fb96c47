"""A detector whose scoring fails never stops the others: it is recorded, retried with
backoff, named by /v1/health, and catches up once repaired."""

from __future__ import annotations

import time

import httpx
import pytest
from sqlalchemy import Engine, select
from starlette.testclient import TestClient

from service.config import Settings
from service.pipeline import score
from service.store import scoring as store_scoring
from service.store import tables
from service.web.app import create_app
from tests.conftest import LiveServer, auth
from tests.factories import rfc3339, small_network
from tests.pipeline.test_alert_revival import Fitted
from tests.pipeline.test_score import HOUR, period_rows, post, visible_alerts

GROUP = ("bra3-nb-lt", "bra3-nb-t1", "bra3-nb-t2")
BROKEN, HEALTHY = "bra3-nb-t1", "bra3-nb-t2"


@pytest.fixture(scope="module")
def network():  # type: ignore[no-untyped-def]
    return small_network(GROUP, history_days=21, test_days=2, seed=3)


@pytest.fixture
def fitted(database_url, engine, network) -> Fitted:  # type: ignore[no-untyped-def]
    return Fitted(engine, Settings(database_url=database_url, clock="data"), network)


def two_dead_spells(net) -> list[list]:  # type: ignore[no-untyped-def]
    """The test period with BROKEN dead 07:00-09:00 and HEALTHY dead 13:00-15:00 local."""
    def edit(r):  # type: ignore[no-untyped-def]
        t = r[1] - net.test_start_s
        if (r[0] == BROKEN and 7 * HOUR <= t < 9 * HOUR) or \
                (r[0] == HEALTHY and 13 * HOUR <= t < 15 * HOUR):
            return [r[0], r[1], 0]
        return r

    return period_rows(net, edit=edit)


def reference_alerts(fitted: Fitted, rows: list[list]) -> set[tuple]:
    """The alerts of the rows scored with nothing failing; leaves the database reset."""
    fitted.reset()
    post(fitted.engine, rows)
    score.score_until_idle(fitted.engine, fitted.settings)
    fitted.assert_drained()
    expected = visible_alerts(fitted.engine)
    for det in (BROKEN, HEALTHY):
        assert any(a[0] == det and a[1] == "zero_counts" for a in expected), expected
    fitted.reset()
    return expected


def state(engine: Engine, detector_id: str):  # type: ignore[no-untyped-def]
    s = tables.detector_state
    with engine.connect() as conn:
        return conn.execute(select(s).where(s.c.detector_id == detector_id)).one()


def let_retry_time_pass(engine: Engine, detector_id: str) -> None:
    """Stand-in for waiting out the backoff: move the detector's retry time to the past."""
    s = tables.detector_state
    with engine.begin() as conn:
        conn.execute(s.update().where(s.c.detector_id == detector_id)
                     .values(retry_after_s=time.time() - 1))


def only(alerts: set[tuple], detector_id: str) -> set[tuple]:
    return {a for a in alerts if a[0] == detector_id}


def health(engine: Engine, database_url: str) -> tuple[int, dict]:
    app = create_app(Settings(database_url=database_url, clock="data", scoring="off"),
                     engine=engine)
    r = TestClient(app).get("/v1/health")
    return r.status_code, r.json()


def test_corrupt_baseline_fails_alone_retries_with_backoff_and_shows_in_health(
        database_url, fitted, network) -> None:
    """One detector's stored baseline is unreadable: the other detectors' alerts are raised in
    the same passes; the broken one is retried after 5, 10, 20 s (not before), health turns
    degraded naming it after three failures, and once repaired it catches up in full."""
    engine, settings = fitted.engine, fitted.settings
    rows = two_dead_spells(network)
    expected = reference_alerts(fitted, rows)
    b = tables.baselines
    with engine.begin() as conn:
        model = conn.execute(select(b.c.model).where(b.c.detector_id == BROKEN)).scalar_one()
        conn.execute(b.update().where(b.c.detector_id == BROKEN).values(model='{"torn": 1}'))
    post(engine, rows)

    for failures in (1, 2, 3):
        before = time.time()
        score.score_until_idle(engine, settings)
        after = time.time()
        row = state(engine, BROKEN)
        assert row.failures == failures and row.last_error.startswith("KeyError")
        delay = store_scoring.RETRY_FIRST_S * 2 ** (failures - 1)
        assert before + delay <= row.retry_after_s <= after + delay
        assert row.claimed_from_s is not None and row.lease_until_s is None  # work kept
        assert only(visible_alerts(engine), HEALTHY) == only(expected, HEALTHY)
        assert not only(visible_alerts(engine), BROKEN)
        assert score.score_pass(engine, settings) == 0, "retried before its backoff ran out"
        code, body = health(engine, database_url)
        assert code == 200
        assert body["status"] == ("degraded" if failures >= 3 else "ok"), body
        assert [f["detector_id"] for f in body["scoring"]["failing"]] == [BROKEN]
        let_retry_time_pass(engine, BROKEN)

    scoring = body["scoring"]
    assert scoring["status"] == "degraded" and scoring["reasons"] == ["detectors_failing"]
    assert scoring["backlog"] == 1 and scoring["retrying"] == 1
    assert scoring["oldest_unscored_age_s"] > 0
    failing = scoring["failing"][0]
    assert failing["failures"] == 3 and failing["last_error"].startswith("KeyError")
    assert failing["failing_since"] and failing["retry_at"]

    with engine.begin() as conn:
        conn.execute(b.update().where(b.c.detector_id == BROKEN).values(model=model))
    score.score_until_idle(engine, settings)
    fitted.assert_drained()
    assert visible_alerts(engine) == expected
    code, body = health(engine, database_url)
    assert code == 200 and body["status"] == "ok" and body["scoring"]["failing"] == []


REFUSE = {
    "sqlite": ["CREATE TRIGGER refuse_evidence BEFORE INSERT ON evidence "
               f"WHEN NEW.detector_id = '{BROKEN}' "
               "BEGIN SELECT RAISE(ABORT, 'evidence refused for this detector'); END"],
    "postgresql": [
        "CREATE FUNCTION refuse_evidence() RETURNS trigger LANGUAGE plpgsql AS $$ BEGIN "
        f"IF NEW.detector_id = '{BROKEN}' THEN "
        "RAISE EXCEPTION 'evidence refused for this detector'; END IF; RETURN NEW; END $$",
        "CREATE TRIGGER refuse_evidence BEFORE INSERT ON evidence FOR EACH ROW "
        "EXECUTE FUNCTION refuse_evidence()"],
}
ALLOW = {"sqlite": ["DROP TRIGGER IF EXISTS refuse_evidence"],
         "postgresql": ["DROP TRIGGER IF EXISTS refuse_evidence ON evidence",
                        "DROP FUNCTION IF EXISTS refuse_evidence()"]}


def run_sql(engine: Engine, statements: list[str]) -> None:
    with engine.begin() as conn:
        for statement in statements:
            conn.exec_driver_sql(statement)


def test_database_refusing_one_detectors_writes_rolls_back_only_that_detector(
        database_url, fitted, network) -> None:
    """The database refuses one detector's evidence mid-pass: only that detector's writes roll
    back (to its savepoint), the others commit in the same pass, and the refused detector
    catches up in full once the database accepts its writes again."""
    engine, settings = fitted.engine, fitted.settings
    rows = two_dead_spells(network)
    expected = reference_alerts(fitted, rows)
    dialect = engine.dialect.name
    run_sql(engine, REFUSE[dialect])
    try:
        post(engine, rows)
        score.score_until_idle(engine, settings)
        row = state(engine, BROKEN)
        assert row.failures == 1 and "evidence refused" in row.last_error
        assert row.scored_through_s is None and row.claimed_from_s is not None
        assert only(visible_alerts(engine), HEALTHY) == only(expected, HEALTHY)
        assert not only(visible_alerts(engine), BROKEN)
        assert state(engine, HEALTHY).failures == 0
    finally:
        run_sql(engine, ALLOW[dialect])
    let_retry_time_pass(engine, BROKEN)
    score.score_until_idle(engine, settings)
    fitted.assert_drained()
    assert visible_alerts(engine) == expected


def test_thresholds_derived_in_a_rolled_back_pass_are_stored_by_the_retry(
        database_url, fitted, network) -> None:
    """Thresholds a pass derives are stored with its results; when that detector's writes roll
    back, the same scorer (same cache) derives them again and stores them on the retry."""
    engine, settings = fitted.engine, fitted.settings
    b, s = tables.baselines, tables.detector_state

    def stored_thresholds() -> str | None:
        with engine.connect() as conn:
            return conn.execute(select(b.c.thresholds).join(s, s.c.baseline_id == b.c.baseline_id)
                                .where(s.c.detector_id == BROKEN)).scalar()

    with engine.begin() as conn:
        conn.execute(b.update().where(b.c.baseline_id == select(s.c.baseline_id).where(
            s.c.detector_id == BROKEN).scalar_subquery()).values(thresholds=None))
    cache = score.ScoringCache()  # one scorer's cache across both passes
    dialect = engine.dialect.name
    run_sql(engine, REFUSE[dialect])
    try:
        post(engine, two_dead_spells(network))
        score.score_until_idle(engine, settings, cache=cache)
        assert stored_thresholds() is None  # rolled back with the detector's other writes
    finally:
        run_sql(engine, ALLOW[dialect])
    let_retry_time_pass(engine, BROKEN)
    score.score_until_idle(engine, settings, cache=cache)
    fitted.assert_drained()
    assert stored_thresholds() is not None


@pytest.mark.slow
def test_live_server_keeps_scoring_past_a_broken_detector(database_url, fitted, network,
                                                          keys) -> None:
    """Through real HTTP and the server's own scorer thread: counts posted for a group with one
    unreadable baseline raise the healthy detectors' alerts, and /v1/health turns degraded
    naming the broken detector once its retries (5 s, then 10 s) have failed too."""
    engine = fitted.engine
    fitted.reset()
    with engine.begin() as conn:
        b = tables.baselines
        conn.execute(b.update().where(b.c.detector_id == BROKEN).values(model='{"torn": 1}'))
    items = [{"detector_id": d, "start": rfc3339_s(t), "count": c}
             for d, t, c in two_dead_spells(network)]
    server = LiveServer(database_url, env={"TALLYWARD_CLOCK": "data"}).start()
    try:
        with httpx.Client(base_url=server.url, timeout=30) as c:
            for lo in range(0, len(items), 2000):
                r = c.post("/v1/counts", json={"counts": items[lo : lo + 2000]},
                           headers=auth(keys["ingest"]))
                assert r.status_code == 200, r.text
            deadline = time.monotonic() + 90
            body: dict = {}
            while time.monotonic() < deadline:
                body = c.get("/v1/health").json()
                if body["status"] == "degraded":
                    break
                time.sleep(0.5)
            alerts = c.get("/v1/alerts", params={"detector_id": HEALTHY, "limit": 1000},
                           headers=auth(keys["read"])).json()["data"]
    finally:
        server.stop()
    assert body["status"] == "degraded", body
    assert [f["detector_id"] for f in body["scoring"]["failing"]] == [BROKEN]
    assert body["scoring"]["failing"][0]["failures"] >= store_scoring.DEGRADED_AFTER_FAILURES
    assert any(a["kind"] == "zero_counts" and not a["withdrawn"] for a in alerts), alerts


def rfc3339_s(t: int) -> str:
    from datetime import UTC, datetime

    return rfc3339(datetime.fromtimestamp(t, UTC))


def test_health_names_no_detector_when_scoring_keeps_up(database_url, fitted, network) -> None:
    """All detectors scored: health is ok with an empty backlog and nothing failing."""
    fitted.reset()
    post(fitted.engine, two_dead_spells(network))
    score.score_until_idle(fitted.engine, fitted.settings)
    code, body = health(fitted.engine, database_url)
    assert code == 200 and body["status"] == "ok"
    scoring = body["scoring"]
    assert scoring == {"status": "ok", "reasons": [], "backlog": 0, "retrying": 0,
                       "oldest_unscored_age_s": None, "longest_wait_s": None, "failing": []}


def test_health_reports_a_stalled_backlog_when_no_scorer_runs(database_url, fitted,
                                                              network) -> None:
    """Counts stored while no scorer runs: health is ok while the wait is short, and degraded
    (backlog_stalled, HTTP 200) once the work has waited over STALLED_AFTER_S."""
    engine = fitted.engine
    fitted.reset()
    post(engine, two_dead_spells(network))
    code, body = health(engine, database_url)
    scoring = body["scoring"]
    assert code == 200 and body["status"] == "ok", body
    assert scoring["backlog"] == len(GROUP) and scoring["failing"] == []
    assert 0 <= scoring["longest_wait_s"] < store_scoring.STALLED_AFTER_S
    assert scoring["oldest_unscored_age_s"] > 0
    s = tables.detector_state
    with engine.begin() as conn:  # as if the counts had arrived 11 minutes ago
        conn.execute(s.update().values(pending_since_s=s.c.pending_since_s - 660))
    code, body = health(engine, database_url)
    assert code == 200 and body["status"] == "degraded", body
    assert body["scoring"]["reasons"] == ["backlog_stalled"]
    assert body["scoring"]["longest_wait_s"] >= 660
    score.score_until_idle(engine, fitted.settings)
    code, body = health(engine, database_url)
    assert body["status"] == "ok" and body["scoring"]["longest_wait_s"] is None


@pytest.mark.slow
def test_a_count_stored_as_text_fails_only_its_detector(sqlite_url, network) -> None:
    """SQLite keeps any value in any column: a count written as text by hand breaks the batch
    read that a pass shares, so the pass is redone detector by detector, the damaged detector
    alone fails, and it catches up once the value is mended."""
    from service.store.engine import make_engine

    settings = Settings(database_url=sqlite_url, clock="data")
    engine = make_engine(settings)
    fitted = Fitted(engine, settings, network)
    rows = two_dead_spells(network)
    expected = reference_alerts(fitted, rows)
    post(engine, rows)
    spot = {"d": BROKEN, "t": network.test_start_s + 3 * HOUR}
    with engine.begin() as conn:
        good = conn.exec_driver_sql("SELECT count FROM counts WHERE detector_id = ? AND "
                                    "start_s = ?", (spot["d"], spot["t"])).scalar_one()
        conn.exec_driver_sql("UPDATE counts SET count = 'twelve' WHERE detector_id = ? AND "
                             "start_s = ?", (spot["d"], spot["t"]))
    score.score_until_idle(engine, settings)
    row = state(engine, BROKEN)
    assert row.failures == 1 and row.last_error.startswith("ValueError")
    assert only(visible_alerts(engine), HEALTHY) == only(expected, HEALTHY)
    assert state(engine, HEALTHY).failures == 0 and state(engine, GROUP[0]).failures == 0
    with engine.begin() as conn:
        conn.exec_driver_sql("UPDATE counts SET count = ? WHERE detector_id = ? AND start_s = ?",
                             (good, spot["d"], spot["t"]))
    let_retry_time_pass(engine, BROKEN)
    score.score_until_idle(engine, settings)
    fitted.assert_drained()
    assert visible_alerts(engine) == expected
    engine.dispose()


REFUSE_STATE = {
    "sqlite": ["CREATE TRIGGER refuse_state BEFORE UPDATE OF scored_through_s ON detector_state "
               f"WHEN NEW.detector_id = '{BROKEN}' "
               "BEGIN SELECT RAISE(ABORT, 'scoring state refused for this detector'); END"],
    "postgresql": [
        "CREATE FUNCTION refuse_state() RETURNS trigger LANGUAGE plpgsql AS $$ BEGIN "
        f"IF NEW.detector_id = '{BROKEN}' THEN "
        "RAISE EXCEPTION 'scoring state refused for this detector'; END IF; RETURN NEW; END $$",
        "CREATE TRIGGER refuse_state BEFORE UPDATE OF scored_through_s ON detector_state "
        "FOR EACH ROW EXECUTE FUNCTION refuse_state()"],
}
ALLOW_STATE = {"sqlite": ["DROP TRIGGER IF EXISTS refuse_state"],
               "postgresql": ["DROP TRIGGER IF EXISTS refuse_state ON detector_state",
                              "DROP FUNCTION IF EXISTS refuse_state()"]}


def test_a_refused_write_among_quiet_detectors_fails_only_that_detector(
        database_url, fitted, network, caplog) -> None:
    """Detectors with nothing flagged are written together. When the database refuses one
    of them, the batch is written again one detector at a time: the refused detector fails
    alone (recorded, retried), the others are scored in the same pass."""
    engine, settings = fitted.engine, fitted.settings
    start = network.test_start_s
    rows = [r for r in period_rows(network) if r[1] < start + 6 * HOUR]
    # Precondition: with nothing refused, these hours flag nothing (the quiet path).
    fitted.reset()
    post(engine, rows)
    score.score_until_idle(engine, settings)
    fitted.assert_drained()
    with engine.connect() as conn:
        assert conn.execute(select(tables.evidence.c.detector_id)).first() is None
    fitted.reset()
    dialect = engine.dialect.name
    run_sql(engine, REFUSE_STATE[dialect])
    try:
        post(engine, rows)
        with caplog.at_level("WARNING", logger="tallyward.scoring"):
            score.score_until_idle(engine, settings)
        assert "writing a batch of quiet detectors failed" in caplog.text
        assert "scoring pass failed" not in caplog.text  # the pass itself went through
        broken = state(engine, BROKEN)
        assert broken.failures == 1 and "scoring state refused" in broken.last_error
        assert broken.scored_through_s is None and broken.claimed_from_s is not None
        for det in GROUP:
            if det != BROKEN:
                ok = state(engine, det)
                assert ok.failures == 0 and ok.scored_through_s >= start + 6 * HOUR - HOUR
    finally:
        run_sql(engine, ALLOW_STATE[dialect])
    let_retry_time_pass(engine, BROKEN)
    score.score_until_idle(engine, settings)
    fitted.assert_drained()
    assert state(engine, BROKEN).failures == 0
