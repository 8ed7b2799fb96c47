"""Migration 0009: a detector out of service when it runs gets an open period from when it
was set so; detectors in service get none; the table matches the store's, and the downgrade
drops it leaving the detectors' states as they were."""

from __future__ import annotations

from sqlalchemy import create_engine, inspect, text

from service.store import migrations as migrate
from service.store import tables
from tests.store.test_interval_migration import empty_url  # noqa: F401  (a fixture)

INSERT = text("INSERT INTO detectors (detector_id, road_class, lanes, interval_s, timezone, "
              "created_s, updated_s, service_state, service_reason, service_by, "
              "service_since_s, service_clock_s) VALUES (:d, 'local', 1, 300, 'UTC', 0, 0, "
              ":state, :reason, :by, :since, :clock)")


def test_out_of_service_detectors_get_an_open_period(empty_url) -> None:  # noqa: F811
    """Upgrade 0008 -> head backfills one open period per detector out of service (from its
    scoring clock, else its wall-clock since); downgrade to 0008 drops the table only."""
    migrate.upgrade(empty_url, "0008")
    engine = create_engine(empty_url)
    with engine.begin() as conn:
        conn.execute(INSERT, [
            {"d": "A", "state": "out_of_service", "reason": "loop cut", "by": "desk-2",
             "since": 1_795_000_000.5, "clock": 1_794_990_000},
            {"d": "B", "state": "out_of_service", "reason": "cabinet flooded", "by": None,
             "since": 1_795_000_100.0, "clock": None},
            {"d": "C", "state": "in_service", "reason": None, "by": None, "since": None,
             "clock": None},
            {"d": "E", "state": "retired", "reason": "removed", "by": "admin-key",
             "since": 1_795_000_000.0, "clock": 1_795_000_000}])
    migrate.upgrade(empty_url)
    with engine.connect() as conn:
        rows = [tuple(r) for r in conn.execute(text(
            "SELECT detector_id, from_s, to_s, reason, actor, closed_by FROM service_periods "
            "ORDER BY detector_id"))]
    assert rows == [("A", 1_794_990_000.0, None, "loop cut", "desk-2", None),
                    ("B", 1_795_000_100.0, None, "cabinet flooded", None, None)]
    columns = {c["name"]: c["nullable"] for c in inspect(engine).get_columns("service_periods")}
    assert columns == {c.name: c.nullable for c in tables.service_periods.columns}
    indexes = {i["name"] for i in inspect(engine).get_indexes("service_periods")}
    assert indexes == {i.name for i in tables.service_periods.indexes}
    migrate.downgrade(empty_url, "0008")
    assert "service_periods" not in inspect(engine).get_table_names()
    with engine.connect() as conn:
        states = conn.execute(text("SELECT detector_id, service_state FROM detectors "
                                   "ORDER BY detector_id")).all()
    assert [tuple(s) for s in states] == [("A", "out_of_service"), ("B", "out_of_service"),
                                          ("C", "in_service"), ("E", "retired")]
    migrate.upgrade(empty_url)  # and up again
    assert "service_periods" in inspect(engine).get_table_names()
    engine.dispose()
