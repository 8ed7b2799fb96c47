"""Builders for test payloads."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
from sqlalchemy import Engine

from service.store import detectors as registry
from service.store.engine import write_transaction
from service.web.schemas import DetectorCreate

# 2026-11-16 00:00 America/Chicago (CST, -06:00)
MONDAY_LOCAL_MIDNIGHT = datetime(2026, 11, 16, 6, 0, tzinfo=UTC)


def detector_payload(**overrides: Any) -> dict[str, Any]:
    body: dict[str, Any] = {
        "interval_s": 300, "lanes": 2, "timezone": "America/Chicago", "group": "G-ELM-NB",
        "label": "Elm Ave northbound at 5th", "road_class": "arterial", "holiday_calendar": "US",
        "location": {"type": "Point", "coordinates": [-97.51, 35.21]},
    }
    body.update(overrides)
    return body


def make_detector(engine: Engine, detector_id: str = "D1", **overrides: Any) -> None:
    with write_transaction(engine) as conn:
        registry.upsert_detector(conn, detector_id, DetectorCreate(**detector_payload(**overrides)))


def rfc3339(moment: datetime) -> str:
    return moment.isoformat().replace("+00:00", "Z")


def count_items(detector_id: str = "D1", *, n: int = 12, interval_s: int = 300,
                start: datetime = MONDAY_LOCAL_MIDNIGHT, base: int = 10) -> list[dict[str, Any]]:
    return [{"detector_id": detector_id, "start": rfc3339(start + timedelta(seconds=i * interval_s)),
             "count": base + i % 7} for i in range(n)]


def load_network(engine: Engine, network: Any, *, until_s: int | None = None) -> int:
    """Register a simulated network's detectors and store its counts (before ``until_s``)."""
    from service.pipeline import ingest
    from service.store.detectors import import_feature_collection
    from service.tools import simulate

    import_feature_collection(engine, simulate.detectors_geojson(network))
    ids = [d.detector_id for d in network.detectors]
    keep = np.ones(network.start_s.size, bool) if until_s is None else network.start_s < until_s
    rows = [(i, ids[int(d)], rfc3339(datetime.fromtimestamp(int(t), UTC)), int(c))
            for i, (d, t, c) in enumerate(zip(network.detector_index[keep], network.start_s[keep],
                                              network.count[keep], strict=True))]
    for lo in range(0, len(rows), 10_000):
        ingest.ingest_items(engine, rows[lo : lo + 10_000], future_tolerance_s=10**9)
    return len(rows)


def small_network(detector_ids: tuple[str, ...], *, history_days: int = 21, test_days: int = 2,
                  inject: bool = False, seed: int = 7) -> Any:
    from service.tools import simulate

    specs = [d for d in simulate.default_detectors() if d.detector_id in detector_ids]
    return simulate.generate_network(seed=seed, detectors=specs, history_days=history_days,
                                     test_days=test_days, inject=inject)
