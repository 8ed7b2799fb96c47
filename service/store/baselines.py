"""Stored baselines: read a fitted model, store a new one, read and write its thresholds JSON.

A stored baseline never changes: a refit inserts a new row with a new ``baseline_id``. What is
read by id may therefore be kept as long as the database lives; ``BaselineCache`` does that for
a scorer.
"""

from __future__ import annotations

import dataclasses
import math
import threading
from typing import Any

import orjson
from sqlalchemy import Connection, select, update

from service.stats import baseline as bl
from service.stats.thresholds import Thresholds
from service.store import tables


def load_baseline(conn: Connection, baseline_id: int) -> bl.Baseline:
    """The fitted model of one stored baseline."""
    b = tables.baselines
    model = conn.execute(select(b.c.model).where(b.c.baseline_id == baseline_id)).scalar_one()
    return bl.Baseline.from_dict(orjson.loads(model))


def current_baselines(conn: Connection, detector_ids: list[str]) -> dict[str, bl.Baseline]:
    """The fitted model each detector is scored with now (detectors without one left out)."""
    if not detector_ids:
        return {}
    b, st = tables.baselines, tables.detector_state
    rows = conn.execute(select(st.c.detector_id, b.c.model).join(
        b, b.c.baseline_id == st.c.baseline_id).where(st.c.detector_id.in_(detector_ids)))
    return {r.detector_id: bl.Baseline.from_dict(orjson.loads(r.model)) for r in rows}


def thresholds_to_json(th: Thresholds) -> str:
    return orjson.dumps(dataclasses.asdict(th)).decode()


def thresholds_from_json(text: str) -> Thresholds:
    return Thresholds(**orjson.loads(text))


def load_thresholds(conn: Connection, baseline_id: int, budget: float
                    ) -> Thresholds | None:
    """The stored thresholds of a baseline if they were derived for this false-alert budget."""
    text = conn.execute(select(tables.baselines.c.thresholds).where(
        tables.baselines.c.baseline_id == baseline_id)).scalar()
    if text:
        th = thresholds_from_json(text)
        if math.isclose(th.false_alerts_per_week, budget):
            return th
    return None


def save_thresholds(conn: Connection, baseline_id: int, th: Thresholds) -> None:
    b = tables.baselines
    conn.execute(update(b).where(b.c.baseline_id == baseline_id).values(
        thresholds=thresholds_to_json(th)))


def insert_baseline(conn: Connection, *, detector_id: str, baseline: bl.Baseline,
                    fitted_s: float, as_of_s: int, summary: dict[str, Any],
                    thresholds_json: str | None) -> int:
    """Store a fitted baseline as a new version; its ``baseline_id``."""
    b = tables.baselines
    return conn.execute(b.insert().values(
        detector_id=detector_id, fitted_s=fitted_s, as_of_s=as_of_s,
        window_start_s=int(baseline.window_start_s), window_end_s=int(baseline.window_end_s),
        model=orjson.dumps(baseline.to_dict(), option=orjson.OPT_SERIALIZE_NUMPY).decode(),
        summary=orjson.dumps(summary).decode(),
        thresholds=thresholds_json).returning(b.c.baseline_id)).scalar_one()


def point_scoring_at(conn: Connection, *, detector_id: str, baseline_id: int, as_of_s: int,
                     now: float) -> None:
    """Score the detector with this baseline from now on; a new detector from ``as_of_s``."""
    s = tables.detector_state
    state = conn.execute(select(s.c.detector_id).where(s.c.detector_id == detector_id)).first()
    if state is None:
        conn.execute(s.insert().values(detector_id=detector_id, baseline_id=baseline_id,
                                       score_from_s=as_of_s, dirty_from_s=as_of_s,
                                       scored_through_s=None, warm_state=None, updated_s=now))
    else:
        conn.execute(s.update().where(s.c.detector_id == detector_id)
                     .values(baseline_id=baseline_id, updated_s=now))


class BaselineCache:
    """Parsed baselines and their thresholds by baseline id, read through from one database.

    Lifetime: that of its owner, one scorer (a worker loop, or one ``score_until_idle`` /
    ``score_pass`` call given none). Entries never go stale while the database lives (stored
    baselines never change), but a cache must not outlive its database: a new database
    restarts the ids. Thread-safe; each map is emptied when it passes ``max_entries``.
    """

    def __init__(self, max_entries: int = 20_000) -> None:
        self._max = max_entries
        self._lock = threading.Lock()
        self._baselines: dict[int, bl.Baseline] = {}
        self._thresholds: dict[tuple[int, float], Thresholds] = {}

    def baseline(self, conn: Connection, baseline_id: int) -> bl.Baseline:
        with self._lock:
            cached = self._baselines.get(baseline_id)
        if cached is not None:
            return cached
        base = load_baseline(conn, baseline_id)
        with self._lock:
            if len(self._baselines) > self._max:
                self._baselines.clear()
            self._baselines[baseline_id] = base
        return base

    def thresholds(self, conn: Connection, baseline_id: int, budget: float
                   ) -> Thresholds | None:
        """Thresholds derived before for this baseline and budget (memory, then database)."""
        with self._lock:
            hit = self._thresholds.get((baseline_id, budget))
        if hit is not None:
            return hit
        th = load_thresholds(conn, baseline_id, budget)
        if th is not None:
            with self._lock:
                if len(self._thresholds) > self._max:
                    self._thresholds.clear()
                self._thresholds[(baseline_id, budget)] = th
        return th

    def clear(self) -> None:
        with self._lock:
            self._baselines.clear()
            self._thresholds.clear()
