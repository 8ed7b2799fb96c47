"""One interval rule (``service.domain.interval_ok``): what registration accepts is exactly what
can be fitted and scored, and anything else is refused at registration saying what is accepted."""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np
import pytest
from sqlalchemy import select

from service.config import Settings
from service.domain import ALLOWED_INTERVALS_S, INTERVAL_RULE_TEXT, interval_ok
from service.pipeline import fit as fitting
from service.pipeline import ingest
from service.pipeline import score as scoring
from service.stats import calendar
from service.store import tables
from tests.conftest import auth
from tests.factories import detector_payload, make_detector, rfc3339

# 2026-10-19 00:00 America/Chicago (CDT, -05:00): a Monday; the history crosses the DST change.
HISTORY_START_S = int(datetime(2026, 10, 19, 5, 0, tzinfo=UTC).timestamp())
HISTORY_DAYS = 15
DEAD_LOCAL_HOURS = (11, 15)  # the scored day's counts are zero from 11:00 to 15:00 local


def test_allowed_intervals_are_20_30_and_the_divisors_of_an_hour_from_60_to_3600() -> None:
    """The allowed set is 20 and 30 s (freeway controllers) and every divisor of 3600 from 60
    to 3600, and the rule text names it."""
    assert ALLOWED_INTERVALS_S == (20, 30) + tuple(s for s in range(60, 3601) if 3600 % s == 0)
    assert {20, 30, 60, 300, 900, 3600} <= set(ALLOWED_INTERVALS_S)
    assert not any(interval_ok(s) for s in (0, 10, 15, 24, 25, 40, 45, 59, 61, 1440, 2880, 3601,
                                            7200, True, 300.0, 20.0))
    assert all(str(s) in INTERVAL_RULE_TEXT for s in ALLOWED_INTERVALS_S)


@pytest.mark.parametrize("interval_s", [1440, 2880, 64, 96, 7200, 45, 15])
def test_put_detector_refuses_an_interval_no_baseline_can_be_fitted_for(
        client, keys, interval_s) -> None:
    """1440 s divides a day but not an hour: 422 naming interval_s and what is accepted."""
    r = client.put("/v1/detectors/D1", json=detector_payload(interval_s=interval_s),
                   headers=auth(keys["admin"]))
    assert r.status_code == 422, r.text
    body = r.json()
    assert body["error"] == "validation_failed"
    assert [p["field"] for p in body["detail"]] == ["interval_s"]
    assert "divide one hour" in body["detail"][0]["message"]
    assert "60, 72, 75" in body["detail"][0]["message"]
    assert client.get("/v1/detectors/D1", headers=auth(keys["read"])).status_code == 404


def test_geojson_import_refuses_1440_naming_the_rule(client, keys) -> None:
    """The bulk import applies the same rule: the 1440 s feature is listed, the other stored."""
    features = [{"type": "Feature", "id": d, "geometry": None,
                 "properties": {"interval_s": s, "timezone": "UTC"}}
                for d, s in (("A1", 1440), ("A2", 720))]
    r = client.post("/v1/detectors:import", json={"type": "FeatureCollection",
                                                   "features": features},
                    headers=auth(keys["admin"]))
    assert r.status_code == 422, r.text
    errors = r.json()["errors"]
    assert len(errors) == 1 and "divide one hour" in str(errors[0])
    assert client.get("/v1/detectors/A2", headers=auth(keys["read"])).status_code == 200


def test_baseline_and_thresholds_refuse_what_registration_refuses() -> None:
    """The statistics refuse 1440 s with the same rule text the API gives."""
    with pytest.raises(ValueError, match="divide one hour"):
        calendar.local_time_grid(np.array([0]), interval_s=1440, timezone="UTC")
    from service.stats.thresholds import calibrate

    with pytest.raises(ValueError, match="divide one hour"):
        calibrate(0.05, interval_s=1440)


def _history(interval_s: int, days: int, *, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Interval starts (UTC s) and Poisson counts with two daily peaks, America/Chicago."""
    starts = np.arange(HISTORY_START_S, HISTORY_START_S + days * 86_400, interval_s)
    grid = calendar.local_time_grid(starts, interval_s=interval_s, timezone="America/Chicago")
    hour = grid.bin * interval_s / 3600.0
    per_hour = 120 + 900 * np.exp(-((hour - 8) ** 2) / 3) + 1000 * np.exp(-((hour - 17) ** 2) / 4)
    weekend = grid.day_type > 0
    per_hour = np.where(weekend, 0.6 * per_hour, per_hour)
    counts = np.random.default_rng(seed).poisson(per_hour * interval_s / 3600.0)
    return starts, counts


def _store(engine, detector_id: str, starts: np.ndarray, counts: np.ndarray) -> None:  # type: ignore[no-untyped-def]
    rows = [(i, detector_id, rfc3339(datetime.fromtimestamp(int(t), UTC)), int(c))
            for i, (t, c) in enumerate(zip(starts, counts, strict=True))]
    for lo in range(0, len(rows), 10_000):
        result = ingest.ingest_items(engine, rows[lo : lo + 10_000], future_tolerance_s=10**9)
        assert not result.rejected, result.to_dict()


@pytest.mark.parametrize("interval_s", ALLOWED_INTERVALS_S)
def test_every_allowed_interval_fits_and_scores(database_url, engine, interval_s) -> None:
    """A detector at any allowed interval is fitted from 2 weeks of counts and its next day is
    scored without failure; four dead midday hours raise a zero_counts alert."""
    settings = Settings(database_url=database_url, clock="data", scoring="off")
    make_detector(engine, "D1", interval_s=interval_s, holiday_calendar=None, group=None)
    starts, counts = _history(interval_s, HISTORY_DAYS + 1, seed=interval_s)
    history = starts < HISTORY_START_S + HISTORY_DAYS * 86_400
    _store(engine, "D1", starts[history], counts[history])

    fitted = fitting.fit_one(engine, "D1", as_of_s=HISTORY_START_S + HISTORY_DAYS * 86_400,
                             settings=settings)
    assert fitted["status"] == "fitted", fitted

    day = starts[~history]
    local_hour = calendar.local_time_grid(day, interval_s=interval_s,
                                    timezone="America/Chicago").bin * interval_s // 3600
    dead = (local_hour >= DEAD_LOCAL_HOURS[0]) & (local_hour < DEAD_LOCAL_HOURS[1])
    _store(engine, "D1", day, np.where(dead, 0, counts[~history]))
    scoring.score_until_idle(engine, settings)

    s, a = tables.detector_state, tables.alerts
    with engine.connect() as conn:
        state = conn.execute(select(s.c.failures, s.c.last_error, s.c.scored_through_s)
                             .where(s.c.detector_id == "D1")).one()
        kinds = set(conn.execute(select(a.c.kind).where(a.c.detector_id == "D1")).scalars())
    assert state.failures == 0, state.last_error
    assert state.scored_through_s is not None and state.scored_through_s >= int(day[dead][-1])
    assert "zero_counts" in kinds, kinds
