"""Count corrections with an audit trail: old value, new value, reason, who and when; the
detector is rescored from the corrected interval."""

from __future__ import annotations

import pytest
from sqlalchemy import select

from service.store import tables
from service.store.engine import write_transaction
from tests.conftest import auth
from tests.factories import make_detector

START = "2026-11-16T14:15:00Z"
START_S = 1_794_838_500


def store_count(client, keys, count: int):  # type: ignore[no-untyped-def]
    r = client.post("/v1/counts", headers=auth(keys["ingest"]),
                    json={"counts": [{"detector_id": "D1", "start": START, "count": count}]})
    assert r.status_code in (200, 409), r.text  # 409: a differing resend, kept as a conflict
    return r


def test_admin_accepts_conflict_offered_value(client, engine, keys) -> None:
    """Accepting a conflict's offered value replaces the stored count; the correction (old,
    new, reason, key, time, conflict) is listed for the detector."""
    make_detector(engine, "D1")
    store_count(client, keys, 40)
    store_count(client, keys, 44)  # a differing resend: recorded as a conflict
    (conflict,) = client.get("/v1/counts/conflicts", headers=auth(keys["read"])).json()["data"]
    r = client.post("/v1/counts/corrections", headers=auth(keys["admin"]),
                    json={"conflict_id": conflict["id"], "reason": "controller log shows 44"})
    assert r.status_code == 201, r.text
    made = r.json()
    assert (made["old"], made["new"], made["by"], made["conflict_id"]) == \
        (40, 44, "admin-key", conflict["id"])
    counts = client.get("/v1/counts", params={"detector_id": "D1"},
                        headers=auth(keys["read"])).json()
    assert [c["count"] for c in counts["data"]] == [44]
    listed = client.get("/v1/counts/corrections", params={"detector_id": "D1"},
                        headers=auth(keys["read"])).json()
    assert listed["data"] == [made] and listed["next_after"] == made["id"]


def test_correction_marks_detector_for_rescoring(client, engine, keys) -> None:
    """A correction marks the detector dirty from the corrected interval, as ingest does."""
    make_detector(engine, "D1")
    store_count(client, keys, 40)
    s = tables.detector_state
    with write_transaction(engine) as conn:
        conn.execute(s.insert().values(detector_id="D1", updated_s=0.0, score_from_s=0,
                                       scored_through_s=START_S + 3600))
    r = client.post("/v1/counts/corrections", headers=auth(keys["admin"]),
                    json={"detector_id": "D1", "start": START, "count": 0,
                          "reason": "loop was disconnected: the 40 was crosstalk"})
    assert r.status_code == 201, r.text
    with engine.connect() as conn:
        assert conn.execute(select(s.c.dirty_from_s)).scalar_one() == START_S


@pytest.mark.parametrize(("body", "status", "word"), [
    ({"detector_id": "D1", "start": "2026-11-16T14:20:00Z", "count": 5, "reason": "r"}, 404,
     "no count is stored"),
    ({"detector_id": "NOPE", "start": START, "count": 5, "reason": "r"}, 404, "NOPE"),
    ({"conflict_id": 12345, "reason": "r"}, 404, "conflict"),
    ({"detector_id": "D1", "start": START, "count": -1, "reason": "r"}, 422, "count"),
    ({"detector_id": "D1", "start": START, "count": 40, "reason": "r"}, 422, "already 40"),
    ({"detector_id": "D1", "start": START, "count": 5}, 422, "reason"),
    ({"detector_id": "D1", "start": START, "reason": "r"}, 422, "conflict_id"),
    ({"detector_id": "D1", "start": "noon", "count": 5, "reason": "r"}, 422, "RFC 3339"),
])
def test_bad_correction_is_clear_error(client, engine, keys, body, status, word) -> None:
    """A count that is not stored, an unknown detector or conflict (404); a negative count,
    an unchanged one, no reason, no count, a bad time (422); the stored count is kept."""
    make_detector(engine, "D1")
    store_count(client, keys, 40)
    r = client.post("/v1/counts/corrections", headers=auth(keys["admin"]), json=body)
    assert r.status_code == status, r.text
    assert word in r.json()["message"], r.json()
    counts = client.get("/v1/counts", params={"detector_id": "D1"},
                        headers=auth(keys["read"])).json()
    assert [c["count"] for c in counts["data"]] == [40]
    assert client.get("/v1/counts/corrections",
                      headers=auth(keys["read"])).json()["data"] == []


def test_only_admin_corrects_counts(client, engine, keys) -> None:
    """Operate keys may not correct counts (403)."""
    make_detector(engine, "D1")
    store_count(client, keys, 40)
    r = client.post("/v1/counts/corrections", headers=auth(keys["operate"]),
                    json={"detector_id": "D1", "start": START, "count": 5, "reason": "r"})
    assert r.status_code == 403
