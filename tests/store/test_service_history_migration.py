"""Migration 0007: detectors start in service, stored acknowledgements become the first entry
of their alert's history, and the downgrade leaves the older schema's rows intact."""

import sqlalchemy as sa
from alembic import command

from service.store import migrations as migrate


def test_existing_rows_get_a_state_and_a_history(tmp_path) -> None:
    url = f"sqlite:///{tmp_path / 'h.db'}"
    cfg = migrate.alembic_config(url)
    command.upgrade(cfg, "0005")
    eng = sa.create_engine(url)
    with eng.begin() as c:
        c.execute(sa.text(
            "INSERT INTO detectors (detector_id, interval_s, timezone, lanes, road_class, "
            "created_s, updated_s) VALUES ('d1', 300, 'UTC', 1, 'arterial', 0, 0)"))
        for i, ack in enumerate(("desk 2", None)):
            c.execute(sa.text(
                "INSERT INTO alerts (seq, subject, detector_id, kind, cause, status, withdrawn, "
                "start_s, end_s, n_intervals, summary, created_s, updated_s, acknowledged_by, "
                "acknowledged_s, ack_note) VALUES (:seq, 'd1', 'd1', 'zero_counts', 'detector', "
                "'open', 0, :s, :s, 1, 'x', 0, 0, :by, :at, :note)"),
                {"seq": i + 1, "s": 300 * i, "by": ack, "at": 1000.0 if ack else None,
                 "note": "crew sent" if ack else None})
    command.upgrade(cfg, "0007")
    with eng.connect() as c:
        assert c.execute(sa.text("SELECT service_state FROM detectors")).scalar_one() == \
            "in_service"
        history = c.execute(sa.text(
            "SELECT a.seq, h.action, h.actor, h.at_s, h.note FROM alert_history h "
            "JOIN alerts a ON a.alert_id = h.alert_id")).all()
        assert [tuple(r) for r in history] == [(1, "acknowledge", "desk 2", 1000.0, "crew sent")]
        assert c.execute(sa.text("SELECT sum(suppressed) FROM alerts")).scalar_one() == 0
    command.downgrade(cfg, "0005")
    with eng.connect() as c:
        assert c.execute(sa.text("SELECT count(*) FROM alerts")).scalar_one() == 2
        assert c.execute(sa.text("SELECT acknowledged_by FROM alerts WHERE seq = 1")
                         ).scalar_one() == "desk 2"
    eng.dispose()
