"""20- and 30-second detectors: fitted and scored on their counts summed to 5-minute windows
(``service.stats.windows``), so the tests judge windows with enough expected vehicles."""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np
import pytest
from sqlalchemy import select

from service.config import Settings
from service.domain import SHORT_INTERVAL_WINDOW_S, scoring_interval_s
from service.pipeline import fit as fitting
from service.pipeline import ingest
from service.pipeline import score as scoring
from service.stats import calendar
from service.stats.windows import complete_window_end, window_sums
from service.store import tables
from tests.factories import make_detector, rfc3339

# 2026-10-05 00:00 America/Chicago (CDT, -05:00), a Monday.
HISTORY_START_S = int(datetime(2026, 10, 5, 5, 0, tzinfo=UTC).timestamp())
HISTORY_DAYS = 14


def test_window_sums_keep_complete_windows_only() -> None:
    """Fifteen 20 s counts make one 300 s window; a window missing one interval is left out
    (a partial sum would read as a drop in volume)."""
    starts = np.arange(0, 900, 20)
    counts = np.arange(starts.size)
    gap = starts != 320  # one interval of the second window is missing
    w, sums = window_sums(starts[gap], counts[gap], interval_s=20, window_s=300)
    assert w.tolist() == [0, 600]
    assert sums.tolist() == [int(counts[:15].sum()), int(counts[30:].sum())]
    assert complete_window_end(580, interval_s=20, window_s=300) == 600
    assert complete_window_end(560, interval_s=20, window_s=300) == 300
    assert scoring_interval_s(20) == scoring_interval_s(30) == SHORT_INTERVAL_WINDOW_S
    assert scoring_interval_s(60) == 60 and scoring_interval_s(300) == 300


def _freeway(interval_s: int, days: int, *, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """A freeway lane at 20 s: about 0.3 vehicles per interval at night, 10 at the peaks."""
    starts = np.arange(HISTORY_START_S, HISTORY_START_S + days * 86_400, interval_s)
    grid = calendar.local_time_grid(starts, interval_s=interval_s, timezone="America/Chicago")
    hour = grid.bin * interval_s / 3600.0
    per_hour = 60 + 1700 * np.exp(-((hour - 8) ** 2) / 3) + 1500 * np.exp(-((hour - 17) ** 2) / 4)
    per_hour = np.where(grid.day_type > 0, 0.6 * per_hour, per_hour)
    return starts, np.random.default_rng(seed).poisson(per_hour * interval_s / 3600.0)


def _store(engine, starts: np.ndarray, counts: np.ndarray) -> None:  # type: ignore[no-untyped-def]
    rows = [(i, "F1", rfc3339(datetime.fromtimestamp(int(t), UTC)), int(c))
            for i, (t, c) in enumerate(zip(starts, counts, strict=True))]
    for lo in range(0, len(rows), 20_000):
        result = ingest.ingest_items(engine, rows[lo : lo + 20_000], future_tolerance_s=10**9)
        assert not result.rejected, result.to_dict()


@pytest.mark.slow
def test_a_20_second_detector_is_fitted_and_scored_on_5_minute_windows(database_url,
                                                                     engine) -> None:
    """A 20 s freeway lane is fitted from two weeks (the baseline is on 300 s windows), its
    next day is scored without failure, evidence lies on the window grid, and two dead
    midday hours raise a zero_counts alert while the normal night raises none."""
    settings = Settings(database_url=database_url, clock="data", scoring="off")
    make_detector(engine, "F1", interval_s=20, road_class="freeway", holiday_calendar=None,
                  group=None)
    starts, counts = _freeway(20, HISTORY_DAYS + 1, seed=20)
    history = starts < HISTORY_START_S + HISTORY_DAYS * 86_400
    _store(engine, starts[history], counts[history])

    as_of = HISTORY_START_S + HISTORY_DAYS * 86_400
    fitted = fitting.fit_one(engine, "F1", as_of_s=as_of, settings=settings)
    assert fitted["status"] == "fitted", fitted

    day = starts[~history]
    local_hour = calendar.local_time_grid(day, interval_s=20,
                                          timezone="America/Chicago").bin * 20 // 3600
    dead = (local_hour >= 12) & (local_hour < 14)
    _store(engine, day, np.where(dead, 0, counts[~history]))
    scoring.score_until_idle(engine, settings)

    s, a, e, b = tables.detector_state, tables.alerts, tables.evidence, tables.baselines
    with engine.connect() as conn:
        model = conn.execute(select(b.c.model).where(b.c.detector_id == "F1")).scalar_one()
        state = conn.execute(select(s.c.failures, s.c.last_error, s.c.scored_through_s)
                             .where(s.c.detector_id == "F1")).one()
        alerts = conn.execute(select(a.c.kind, a.c.start_s, a.c.end_s)
                              .where(a.c.detector_id == "F1", a.c.withdrawn == 0)).all()
        evidence_starts = conn.execute(select(e.c.start_s).where(e.c.detector_id == "F1")
                                       ).scalars().all()
    assert '"interval_s": 300' in model.replace('"interval_s":300', '"interval_s": 300')
    assert state.failures == 0, state.last_error
    assert state.scored_through_s >= int(day[-1]) + 20 - SHORT_INTERVAL_WINDOW_S
    assert all(t % SHORT_INTERVAL_WINDOW_S == 0 for t in evidence_starts)
    zero = [r for r in alerts if r.kind == "zero_counts"]
    assert zero, alerts
    dead_lo, dead_hi = int(day[dead][0]), int(day[dead][-1])
    assert all(dead_lo - 3600 <= r.start_s <= dead_hi for r in zero), (zero, dead_lo, dead_hi)
