"""Migration 0005 renames stored alert kinds and evidence in place and back on downgrade."""

import sqlalchemy as sa
from alembic import command

from service.store import migrations as migrate


def test_stored_kinds_are_renamed_and_restored(tmp_path) -> None:
    url = f"sqlite:///{tmp_path / 'k.db'}"
    cfg = migrate.alembic_config(url)
    command.upgrade(cfg, "0004")
    eng = sa.create_engine(url)
    old_reports, old_zero = "no_" + "data", "no_" + "counts"
    with eng.begin() as c:
        c.execute(sa.text(
            "INSERT INTO detectors (detector_id, interval_s, timezone, lanes, road_class, "
            "created_s, updated_s) VALUES ('d1', 300, 'UTC', 1, 'arterial', 0, 0)"))
        for i, kind in enumerate((old_reports, old_zero, "low_volume")):
            c.execute(sa.text(
                "INSERT INTO alerts (seq, subject, detector_id, kind, cause, status, withdrawn, "
                "start_s, end_s, n_intervals, summary, created_s, updated_s) VALUES "
                "(:seq, 'd1', 'd1', :kind, 'unknown', 'open', 0, :s, :s, 1, 'x', 0, 0)"),
                {"seq": i + 1, "kind": kind, "s": 300 * i})
            c.execute(sa.text("INSERT INTO evidence (detector_id, start_s, kind, log_p) "
                              "VALUES ('d1', :s, :kind, -5)"), {"s": 300 * i, "kind": kind})
    command.upgrade(cfg, "0005")
    with eng.connect() as c:
        kinds = [r[0] for r in c.execute(sa.text("SELECT kind FROM alerts ORDER BY seq"))]
        ev = [r[0] for r in c.execute(sa.text("SELECT kind FROM evidence ORDER BY start_s"))]
    assert kinds == ev == ["no_reports", "zero_counts", "low_volume"]
    command.downgrade(cfg, "0004")
    with eng.connect() as c:
        kinds = [r[0] for r in c.execute(sa.text("SELECT kind FROM alerts ORDER BY seq"))]
    assert kinds == [old_reports, old_zero, "low_volume"]
    eng.dispose()
