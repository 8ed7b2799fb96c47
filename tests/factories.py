"""Builders for test payloads; the network builders are shared with bench/ and the demo
(``service.tools.networks``)."""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any

from service.tools.networks import (
    MONDAY_LOCAL_MIDNIGHT,
    detector_payload,
    load_network,
    make_detector,
    rfc3339,
    small_network,
)

__all__ = ["MONDAY_LOCAL_MIDNIGHT", "count_items", "detector_payload", "load_network",
           "make_detector", "rfc3339", "small_network"]


def count_items(detector_id: str = "D1", *, n: int = 12, interval_s: int = 300,
                start: datetime = MONDAY_LOCAL_MIDNIGHT, base: int = 10) -> list[dict[str, Any]]:
    return [{"detector_id": detector_id, "start": rfc3339(start + timedelta(seconds=i * interval_s)),
             "count": base + i % 7} for i in range(n)]
