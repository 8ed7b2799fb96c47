"""The network page's per-detector reads (``store.overview.network``) on both databases: the
latest interval and the 24 h completeness of detectors reporting now, reporting ahead of the
clock, silent for two days and never reporting (PostgreSQL reads them in one grouped pass with
a look-up for the quiet ones; SQLite per detector)."""

from __future__ import annotations

import math
import time

from sqlalchemy import insert

from service.store import overview, tables
from service.store.engine import write_transaction
from tests.factories import make_detector

DAY_S = 86_400


def test_network_latest_interval_and_completeness_per_detector(settings, engine) -> None:
    """D1 stored 12 of the last 24 h's 288 intervals and one ahead of the clock (latest, not
    counted); D2 only two days ago (latest shown, 0 %); D3 nothing; D4 every interval."""
    for det in ("D1", "D2", "D3", "D4"):
        make_detector(engine, det)  # 5-minute intervals
    now = time.time()
    top = int(now) // 300 * 300 - 300  # the latest whole interval before now
    rows = [("D1", top - i * 300) for i in range(12)] + [("D1", top + 3600)]
    rows += [("D2", top - 2 * DAY_S - i * 300) for i in range(5)]
    rows += [("D4", top - i * 300) for i in range(288)]
    rows += [("D4", top - DAY_S - 300)]  # just before the window: not counted
    with write_transaction(engine) as conn:
        conn.execute(insert(tables.counts), [
            {"detector_id": d, "start_s": s, "count": 7, "received_s": now} for d, s in rows])
    clock, found = overview.network(engine, settings.model_copy(update={"clock": "wall"}))
    by = {r.detector_id: r for r in found}
    assert [r.detector_id for r in found] == ["D1", "D2", "D3", "D4"]
    assert by["D1"].last_start_s == top + 3600 and math.isclose(by["D1"].completeness_24h, 12 / 288)
    assert by["D2"].last_start_s == top - 2 * DAY_S and by["D2"].completeness_24h == 0
    assert by["D3"].last_start_s is None and by["D3"].completeness_24h == 0
    assert by["D3"].state == by["D2"].state == "silent"
    lo = int(clock) - DAY_S
    expected_d4 = sum(1 for i in range(288) if lo <= top - i * 300 < clock) / 288
    assert by["D4"].last_start_s == top and math.isclose(by["D4"].completeness_24h, expected_d4)
