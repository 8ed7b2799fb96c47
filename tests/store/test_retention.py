"""Storage maintenance (``service.pipeline.retention.maintain_storage``): counts partitions made
ahead of time on PostgreSQL, hourly totals that equal the raw sums, expiry of raw intervals
(whole partitions dropped on PostgreSQL, a bounded delete on SQLite), and queries that read
only the partitions they need."""

from __future__ import annotations

import re
from collections import defaultdict

import numpy as np
import pytest
from sqlalchemy import event, text

from service.config import Settings
from service.pipeline import fit as fitting
from service.pipeline.retention import maintain_storage
from service.store import partitions as parts
from service.store.counts import counts_page, json_row
from service.store.engine import make_engine
from service.store.scoring import counts_between
from tests.conftest import PG_URL
from tests.factories import make_detector

DAY_S = 86_400
NOW_S = 1_795_000_000 - 1_795_000_000 % DAY_S + 13 * 3600  # 13:00 UTC on a day in Nov 2026
pg_only = pytest.mark.skipif(not PG_URL, reason="TALLYWARD_TEST_DATABASE_URL not set")


def _insert_counts(engine, detector_id: str, starts: np.ndarray, counts: np.ndarray) -> None:  # type: ignore[no-untyped-def]
    with engine.begin() as conn:
        conn.execute(text("INSERT INTO counts (detector_id, start_s, count, received_s) "
                          "VALUES (:d, :s, :c, 0)"),
                     [{"d": detector_id, "s": int(s), "c": int(c)}
                      for s, c in zip(starts, counts, strict=True)])


def _network(engine, *, days: int, seed: int) -> dict[tuple[str, int], list[int]]:  # type: ignore[no-untyped-def]
    """Two 5-minute detectors with ``days`` of counts before NOW_S and some flagged intervals;
    the expected hourly (volume, intervals, flagged) computed here from the same numbers."""
    rng = np.random.default_rng(seed)
    expected: dict[tuple[str, int], list[int]] = defaultdict(lambda: [0, 0, 0])
    for det in ("R1", "R2"):
        make_detector(engine, det, interval_s=300, group=None)
        starts = np.arange(NOW_S - days * DAY_S, NOW_S, 300)
        starts = starts[rng.random(starts.size) > 0.05]  # some intervals never arrive
        counts = rng.poisson(40, starts.size)
        _insert_counts(engine, det, starts, counts)
        for s, c in zip(starts, counts, strict=True):
            row = expected[(det, int(s) - int(s) % 3600)]
            row[0] += int(c)
            row[1] += 1
        flagged = rng.choice(starts, 30, replace=False)
        with engine.begin() as conn:
            for s in flagged:
                for kind in ("low_volume", "zero_counts"):  # two kinds: one flagged interval
                    conn.execute(text("INSERT INTO evidence (detector_id, start_s, kind, log_p) "
                                      "VALUES (:d, :s, :k, -9)"), {"d": det, "s": int(s), "k": kind})
                expected[(det, int(s) - int(s) % 3600)][2] += 1
    return expected


def _hours(engine) -> dict[tuple[str, int], list[int]]:  # type: ignore[no-untyped-def]
    with engine.connect() as conn:
        return {(r.detector_id, r.hour_s): [r.volume, r.intervals, r.flagged] for r in conn.execute(
            text("SELECT detector_id, hour_s, volume, intervals, flagged FROM count_hours"))}


def test_retention_keeps_exact_hourly_totals_and_removes_expired_intervals(database_url,
                                                                         engine) -> None:
    """After maintenance with a 10-day retention, every detector-hour of 30 days equals the raw
    sums taken before the intervals expired (vehicles, intervals reported, intervals flagged),
    and no raw interval older than the retention is left (on PostgreSQL up to one partition
    older, whole partitions being dropped)."""
    expected = _network(engine, days=30, seed=1)
    settings = Settings(database_url=database_url, raw_retention_days=10, partition_days=7,
                        retention_batch_rows=500)
    dropped: list[str] = []
    for days_before in range(30, -1, -1):  # maintenance once a day as the clock moves on
        report = maintain_storage(engine, settings, NOW_S - days_before * DAY_S)
        dropped += report.partitions_dropped
        expired = report.rows_expired

    assert _hours(engine) == {k: v for k, v in expected.items()}
    cutoff = NOW_S - NOW_S % 3600 - 10 * DAY_S
    with engine.connect() as conn:
        oldest = conn.execute(text("SELECT min(start_s) FROM counts")).scalar()
        newest_kept = conn.execute(text("SELECT count(*) FROM counts WHERE start_s >= :c"),
                                   {"c": cutoff}).scalar()
    assert newest_kept == sum(v[1] for (_, h), v in expected.items() if h >= cutoff)
    if engine.dialect.name == "postgresql":
        assert dropped
        assert oldest >= cutoff - settings.partition_days * DAY_S
    else:
        assert expired > 0 and oldest >= cutoff


def test_an_interval_arriving_after_its_hour_expired_is_added_to_the_total(database_url,
                                                                          engine) -> None:
    """A late interval for an hour whose raw intervals already expired is added to the stored
    total when it expires in turn, never replacing it."""
    expected = _network(engine, days=20, seed=2)
    settings = Settings(database_url=database_url, raw_retention_days=5, partition_days=1)
    for days_before in range(20, -1, -1):
        maintain_storage(engine, settings, NOW_S - days_before * DAY_S)
    hour = NOW_S - NOW_S % 3600 - 15 * DAY_S
    old = _hours(engine)[("R1", hour)]
    assert old[:2] == expected[("R1", hour)][:2]
    # A start no stored interval had (the table does not check the grid; ingest does).
    _insert_counts(engine, "R1", np.array([hour + 3599]), np.array([77]))
    maintain_storage(engine, settings, NOW_S)
    assert _hours(engine)[("R1", hour)][:2] == [old[0] + 77, old[1] + 1]
    with engine.connect() as conn:
        assert conn.execute(text("SELECT count(*) FROM counts WHERE start_s < :c"),
                            {"c": hour + 3600}).scalar() == 0


@pg_only
def test_partitions_are_created_ahead_of_the_clock(database_url, engine) -> None:
    """PostgreSQL: maintenance creates range partitions from the clock to partition_ahead_days
    ahead; an interval stored there lands in its range partition, not the default one, and a
    second pass creates nothing."""
    if engine.dialect.name != "postgresql":
        pytest.skip("partitions are PostgreSQL's")
    settings = Settings(database_url=database_url, partition_days=1, partition_ahead_days=5)
    now = NOW_S + 400 * DAY_S  # a range no other test has made partitions for
    report = maintain_storage(engine, settings, now)
    with engine.connect() as conn:
        assert parts.is_partitioned(conn)
        covered = [p for p in parts.partitions(conn) if p.hi_s > now]
    assert len(report.partitions_created) >= 5
    assert covered[0].lo_s <= now and covered[-1].hi_s >= now + 5 * DAY_S
    make_detector(engine, "P1", interval_s=300, group=None)
    _insert_counts(engine, "P1", np.array([now + 3 * DAY_S]), np.array([9]))
    with engine.connect() as conn:
        where = conn.execute(text("SELECT tableoid::regclass::text FROM counts "
                                  "WHERE detector_id = 'P1'")).scalar()
    assert where == parts.partition_name((now + 3 * DAY_S) - (now + 3 * DAY_S) % DAY_S)
    assert maintain_storage(engine, settings, now).partitions_created == []


@pg_only
def test_rows_in_the_default_partition_move_into_partitions_of_their_own(database_url,
                                                                         engine) -> None:
    """PostgreSQL: intervals stored where no partition existed (the default partition) are moved
    into range partitions by maintenance, none lost."""
    if engine.dialect.name != "postgresql":
        pytest.skip("partitions are PostgreSQL's")
    make_detector(engine, "P2", interval_s=300, group=None)
    far = NOW_S + 900 * DAY_S
    starts = np.arange(far, far + 3 * DAY_S, 300)
    _insert_counts(engine, "P2", starts, np.full(starts.size, 5))
    with engine.connect() as conn:
        assert conn.execute(text("SELECT count(*) FROM counts_default")).scalar() == starts.size
    maintain_storage(engine, Settings(database_url=database_url, partition_days=1), NOW_S)
    with engine.connect() as conn:
        assert conn.execute(text("SELECT count(*) FROM counts_default")).scalar() == 0
        assert conn.execute(text("SELECT count(*), sum(count) FROM counts "
                                 "WHERE detector_id = 'P2'")).one() == (starts.size, 5 * starts.size)


def _scanned(conn, sql: str, params) -> set[str]:  # type: ignore[no-untyped-def]
    """Names of the counts partitions in the plan of ``sql``."""
    cur = conn.connection.driver_connection.cursor()
    try:
        cur.execute("EXPLAIN " + sql, params)
        plan = "\n".join(r[0] for r in cur.fetchall())
    finally:
        cur.close()
    return set(re.findall(r" on (counts_(?:p\d{8}|default))\b", plan))


@pg_only
def test_scorer_fit_and_api_counts_queries_read_only_the_partitions_they_need(database_url,
                                                                              engine) -> None:
    """PostgreSQL EXPLAIN: with 8 weekly partitions, the fit's history read (two weeks) and
    the API's counts page (one day) each plan scans of only the partitions overlapping their
    time range; the scorer's counts read (from the earliest interval its claims need, with no
    upper end, so that the same rows give each detector's latest interval) none before it."""
    if engine.dialect.name != "postgresql":
        pytest.skip("partitions are PostgreSQL's")
    week = 7 * DAY_S
    base = NOW_S + 2000 * DAY_S
    base -= base % week
    settings = Settings(database_url=database_url, partition_days=7, partition_ahead_days=8 * 7)
    maintain_storage(engine, settings, base)
    make_detector(engine, "X1", interval_s=300, group=None)
    _insert_counts(engine, "X1", np.arange(base, base + 8 * week, 3600), np.ones(8 * 168))
    with engine.connect() as conn:
        names = {p.lo_s: p.name for p in parts.partitions(conn)}
    week5 = {names[base + 4 * week]}
    captured: list[tuple[str, object]] = []

    def capture(conn, cursor, statement, parameters, context, executemany):  # type: ignore[no-untyped-def]
        if "counts" in statement:
            captured.append((statement, parameters))

    day_lo = base + 4 * week + DAY_S
    event.listen(engine, "before_cursor_execute", capture)
    try:
        with engine.connect() as conn:
            counts_between(conn, ["X1"], day_lo, None)
            scorer_read = captured[-1]
        mark = len(captured)
        counts_page(engine, detector_id="X1", group=None, from_s=day_lo, until_s=day_lo + DAY_S,
                    after=None, limit=500, max_bytes=1 << 20, encode=json_row)
        # The page's read of counts (the quality flags' reads of evidence and alerts follow it).
        api_read = next(c for c in captured[mark:] if "FROM counts" in c[0])
    finally:
        event.remove(engine, "before_cursor_execute", capture)

    with engine.connect() as conn:
        scorer = _scanned(conn, *scorer_read)  # no upper end: later partitions are read
        assert week5 | {names[base + 7 * week]} <= scorer
        assert not scorer & {names[base + k * week] for k in range(4)}
        assert _scanned(conn, *api_read) == week5
        fit_sql = fitting.HISTORY_SQL.format(mark="%s")
        assert _scanned(conn, fit_sql, ("X1", base + 2 * week, base + 4 * week)) == {
            names[base + 2 * week], names[base + 3 * week]}


@pg_only
def test_partition_upkeep_beside_ingest_and_reads_fails_nothing_and_loses_nothing(
        database_url, engine) -> None:
    """PostgreSQL: maintenance making partitions (and moving stray rows out of the default
    partition) while three writers store counts into the default partition and read the
    latest interval: every statement succeeds and every count is kept. (Without the
    exclusive lock on ``counts`` first, rows stored between the move and the attach made the
    attach fail, and the partition DDL could deadlock with ingest.)"""
    import threading

    if engine.dialect.name != "postgresql":
        pytest.skip("partitions are PostgreSQL's")
    make_detector(engine, "W1", interval_s=300, group=None)
    stop = threading.Event()
    errors: list[str] = []
    stored = [0, 0, 0]
    far = NOW_S - 400 * DAY_S  # no partition holds these: they land in the default partition

    def writer(k: int) -> None:
        i = 0
        while not stop.is_set():
            try:
                with engine.begin() as conn:
                    conn.execute(text("SELECT max(start_s) FROM counts")).scalar()
                    conn.execute(text(
                        "INSERT INTO counts (detector_id, start_s, count, received_s) "
                        "VALUES ('W1', :t, 1, 0)"), {"t": far + 300 * (3 * i + k)})
                stored[k] += 1
                i += 1
            except Exception as exc:  # noqa: BLE001 - collected for the assertion
                errors.append(f"writer: {type(exc).__name__}: {exc}"[:300])
    threads = [threading.Thread(target=writer, args=(k,)) for k in range(3)]
    for t in threads:
        t.start()
    try:
        for k in range(6):
            try:
                maintain_storage(engine, Settings(database_url=database_url, partition_days=1,
                                                  partition_ahead_days=10),
                                 NOW_S + k * 10 * DAY_S)
            except Exception as exc:  # noqa: BLE001 - collected for the assertion
                errors.append(f"maintain: {type(exc).__name__}: {exc}"[:300])
    finally:
        stop.set()
        for t in threads:
            t.join(30)
    assert errors == []
    assert sum(stored) > 0
    with engine.connect() as conn:
        assert conn.execute(text("SELECT count(*) FROM counts WHERE detector_id = 'W1'")
                            ).scalar() == sum(stored)


@pg_only
def test_maintenance_vacuums_the_scoring_state_and_the_registry(database_url, engine) -> None:
    """PostgreSQL: a maintenance pass vacuums and analyzes detector_state and detectors (the
    tables every scoring pass rewrites or joins) and analyzes alerts, whether or not
    autovacuum runs."""
    if engine.dialect.name != "postgresql":
        pytest.skip("VACUUM is PostgreSQL's")
    settings = Settings(database_url=database_url)
    report = maintain_storage(engine, settings, NOW_S)
    assert report.vacuumed == ["detector_state", "detectors", "alerts"]
    with engine.connect() as conn:
        done = dict(conn.execute(text(
            "SELECT relname, (last_vacuum IS NOT NULL OR relname = 'alerts') "
            "AND last_analyze IS NOT NULL FROM pg_stat_user_tables "
            "WHERE relname IN ('detector_state', 'detectors', 'alerts')")).all())
    assert done == {"detector_state": True, "detectors": True, "alerts": True}


@pg_only
def test_a_table_another_session_holds_is_skipped_not_fatal(database_url, engine) -> None:
    """PostgreSQL: when another session holds detector_state past the lock timeout (an
    autovacuum, say), the pass skips that table and still does the others."""
    if engine.dialect.name != "postgresql":
        pytest.skip("VACUUM is PostgreSQL's")
    settings = Settings(database_url=database_url, db_lock_timeout_s=0.5)
    impatient = make_engine(settings)
    with engine.connect() as holder:
        holder.execute(text("LOCK TABLE detector_state IN SHARE UPDATE EXCLUSIVE MODE"))
        report = maintain_storage(impatient, settings, NOW_S)
        holder.rollback()
    impatient.dispose()
    assert report.vacuumed == ["detectors", "alerts"]
