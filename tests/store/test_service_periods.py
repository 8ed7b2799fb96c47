"""Out-of-service periods are kept: each change of service state opens or closes the
detector's period in the same transaction, including the return by itself at `until`."""

from __future__ import annotations

from sqlalchemy import select

from service.store import detectors as registry
from service.store import quality, tables
from service.store.engine import read_transaction
from tests.factories import make_detector

NOW = 1_795_000_000.0  # wall clock of the changes (2026-11-18)
DATA_CLOCK = 1_794_900_000.0  # the scoring clock of a replay, behind the wall clock


def change(engine, state: str, *, now: float, at_s: float, by: str = "operate-key",  # type: ignore[no-untyped-def]
           reason: str | None = "loop cut", until_s: float | None = None) -> None:
    registry.set_service_state(engine, "D1", state=state, reason=reason, until_s=until_s, by=by,
                               may_retire=True, clock=lambda conn: at_s, now=now,
                               period_clock=lambda conn: at_s)


def periods(engine) -> list[tuple]:  # type: ignore[no-untyped-def, type-arg]
    p = tables.service_periods
    with read_transaction(engine) as conn:
        return [tuple(r) for r in conn.execute(
            select(p.c.from_s, p.c.to_s, p.c.reason, p.c.actor, p.c.closed_by)
            .where(p.c.detector_id == "D1").order_by(p.c.period_id))]


def test_taking_out_and_returning_opens_and_closes_one_period(engine) -> None:
    """Out of service opens a period at the scoring clock; back in service closes it there,
    naming who did each."""
    make_detector(engine, "D1")
    change(engine, "out_of_service", now=NOW, at_s=DATA_CLOCK, reason="loop cut, WO 4471")
    assert periods(engine) == [(DATA_CLOCK, None, "loop cut, WO 4471", "operate-key", None)]
    change(engine, "in_service", now=NOW + 60, at_s=DATA_CLOCK + 7200, by="desk-2",
           reason=None)
    assert periods(engine) == [(DATA_CLOCK, DATA_CLOCK + 7200, "loop cut, WO 4471",
                                "operate-key", "desk-2")]
    change(engine, "in_service", now=NOW + 120, at_s=DATA_CLOCK + 9000, reason=None)
    assert len(periods(engine)) == 1  # in service again: nothing to close


def test_second_out_of_service_keeps_both_reasons_and_retiring_closes(engine) -> None:
    """A new reason while out of service closes the period and opens the next at the same
    time (no gap, both reasons kept); retiring the detector closes the open period."""
    make_detector(engine, "D1")
    change(engine, "out_of_service", now=NOW, at_s=1000.0, reason="loop cut")
    change(engine, "out_of_service", now=NOW + 1, at_s=2000.0, reason="cabinet flooded")
    change(engine, "retired", now=NOW + 2, at_s=3000.0, by="admin-key", reason="removed")
    assert [(f, t, r) for f, t, r, _, _ in periods(engine)] == [
        (1000.0, 2000.0, "loop cut"), (2000.0, 3000.0, "cabinet flooded")]


def test_return_by_itself_at_until_closes_the_period_with_its_declared_length(engine) -> None:
    """The sweep that returns a detector at its until (wall clock) closes the period as long
    after its start as the wall-clock period lasted, on the scoring clock it opened on."""
    make_detector(engine, "D1")
    change(engine, "out_of_service", now=NOW, at_s=DATA_CLOCK, until_s=NOW + 5400)
    assert registry.return_due(engine, now=NOW + 5399) == []
    assert periods(engine)[0][1] is None
    assert registry.return_due(engine, now=NOW + 5401) == ["D1"]
    (period,) = periods(engine)
    assert period[:2] == (DATA_CLOCK, DATA_CLOCK + 5400) and period[4] is None


def test_flags_follow_the_periods_start_inclusive_end_exclusive(engine) -> None:
    """Starts in [from, to) of a closed period, and from an open period's start on, are
    out_of_service; a corrected start is `corrected` even inside a period."""
    make_detector(engine, "D1")
    change(engine, "out_of_service", now=NOW, at_s=1200.0)
    change(engine, "in_service", now=NOW + 1, at_s=2100.0, reason=None)
    change(engine, "out_of_service", now=NOW + 2, at_s=3000.0)
    with engine.begin() as conn:
        conn.execute(tables.counts.insert().values(detector_id="D1", start_s=1500, count=3,
                                                   received_s=NOW))
        conn.execute(tables.count_corrections.insert().values(
            detector_id="D1", start_s=1500, old_count=0, new_count=3, reason="r",
            actor="admin-key", corrected_s=NOW))
    starts = [900, 1200, 1500, 1800, 2100, 2400, 2700, 3000, 3300]
    with read_transaction(engine) as conn:
        lookup = quality.flag_lookup(conn, "D1", from_s=0, until_s=4000)
    expected = ["ok", "out_of_service", "corrected", "out_of_service", "ok", "ok", "ok",
                "out_of_service", "out_of_service"]
    assert lookup.flags(starts) == expected
    assert [lookup.flag(t) for t in starts] == expected
    assert [quality.replaced_by_imputation(f) for f in expected] == [
        f == "out_of_service" for f in expected]


def test_open_period_with_until_ends_at_its_declared_length_before_the_sweep(engine) -> None:
    """Before the sweep records the return at until, the flags already end the period where
    the sweep will close it (as the detector record already shows it in service)."""
    make_detector(engine, "D1")
    change(engine, "out_of_service", now=NOW, at_s=3000.0, until_s=NOW + 900)
    with read_transaction(engine) as conn:
        flags = quality.flag_lookup(conn, "D1", from_s=0, until_s=9000).flags(
            [2700, 3000, 3600, 3900, 4200])
    assert flags == ["ok", "out_of_service", "out_of_service", "ok", "ok"]
    assert registry.return_due(engine, now=NOW + 901) == ["D1"]
    with read_transaction(engine) as conn:
        assert quality.flag_lookup(conn, "D1", from_s=0, until_s=9000).flags(
            [2700, 3000, 3600, 3900, 4200]) == flags
