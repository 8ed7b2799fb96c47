"""PostgreSQL EXPLAIN: an alert poll reads an index bounded by seq (and by its filter where an
index leads with it), caught up or far behind, with or without filters; it never scans the
alerts table."""

from __future__ import annotations

import re

import pytest
from sqlalchemy import text
from sqlalchemy.dialects import postgresql

from service.store.alerts import poll_query
from tests.conftest import PG_URL

pytestmark = [pytest.mark.db,
              pytest.mark.skipif(not PG_URL, reason="TALLYWARD_TEST_DATABASE_URL not set")]

N = 20_000  # alerts: 100 groups, four of the six kinds, one in 20 open


@pytest.fixture
def alerts_stored(engine):  # type: ignore[no-untyped-def]
    if engine.dialect.name != "postgresql":
        pytest.skip("EXPLAIN plans are PostgreSQL's")
    with engine.begin() as conn:
        conn.execute(text(
            "INSERT INTO alerts (seq, subject, detector_id, group_id, kind, cause, status, "
            "withdrawn, start_s, end_s, n_intervals, summary, created_s, updated_s, suppressed) "
            "SELECT g, 'group:G' || lpad((g % 100)::text, 3, '0'), NULL, "
            "'G' || lpad((g % 100)::text, 3, '0'), "
            "(ARRAY['zero_counts', 'low_volume', 'high_volume', 'no_reports'])[1 + g % 4], "
            "'unknown', CASE WHEN g % 20 = 0 THEN 'open' ELSE 'closed' END, 0, 300 * g, "
            "300 * g, 1, 'benchmark', 0, 0, 0 FROM generate_series(1, :n) g"), {"n": N})
        conn.execute(text("UPDATE counters SET value = :n WHERE name = 'alert_seq'"), {"n": N})
    with engine.connect().execution_options(isolation_level="AUTOCOMMIT") as conn:
        conn.execute(text("ANALYZE alerts"))
    return engine


def plan(engine, **params) -> str:  # type: ignore[no-untyped-def]
    """The plan of the poll's page query with these values (planned for them, as ``poll``
    has PostgreSQL do)."""
    sql = str(poll_query(**params).compile(dialect=postgresql.dialect(),
                                           compile_kwargs={"literal_binds": True}))
    with engine.connect() as conn:
        return "\n".join(r[0] for r in conn.execute(text("EXPLAIN " + sql)))


@pytest.mark.parametrize(("params", "index"), [
    ({"after": N, "limit": 500}, "uq_alerts_seq"),  # caught up: the documented poll
    ({"after": N - 100, "limit": 100, "status": "open", "group": "G007"}, None),
    ({"after": 0, "limit": 100, "group": "G007", "kind": "no_reports"},
     "ix_alerts_group_id_seq"),
    ({"after": 0, "limit": 100, "kind": "over_capacity"}, "ix_alerts_kind_seq"),  # none stored
    ({"after": 0, "limit": 500, "status": "open"}, None),
], ids=["caught-up", "caught-up-filtered", "from-0-group-kind", "from-0-rare-kind",
        "from-0-open"])
def test_a_poll_reads_an_index_bounded_by_seq(alerts_stored, params, index) -> None:
    """Each poll's plan reads an index whose condition bounds seq (and the filter column when
    it leads the index): what it reads follows the page or the matching alerts, never the
    whole table."""
    got = plan(alerts_stored, **params)
    assert "Seq Scan" not in got, got
    assert re.search(r"Index Cond: .*\bseq > \d+", got), got
    if index is not None:
        assert re.search(rf"(Index Scan using|Bitmap Index Scan on) {index}\b", got), got


def test_a_far_behind_group_poll_uses_its_index_in_a_generic_plan_too(alerts_stored) -> None:
    """A prepared statement's generic plan (no values known) of a group poll reads the
    (group_id, seq) index, not the whole seq index."""
    with alerts_stored.connect() as conn:
        conn.execute(text("SET plan_cache_mode = force_generic_plan"))
        conn.execute(text(
            "PREPARE poll_by_group(bigint, text, int) AS SELECT * FROM alerts WHERE seq > $1 "
            "AND part_of IS NULL AND group_id = $2 AND suppressed = 0 ORDER BY seq LIMIT $3"))
        got = "\n".join(r[0] for r in conn.execute(
            text("EXPLAIN EXECUTE poll_by_group(0, 'G007', 100)")))
    assert "using ix_alerts_group_id_seq on alerts" in got, got
    assert "Sort" not in got, got
