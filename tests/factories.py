"""Builders for test payloads."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy import Engine

from service import registry
from service.db import write_transaction
from service.schemas import DetectorCreate

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
