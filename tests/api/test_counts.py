"""POST /v1/counts: every item stored once or reported, with a status a controller can act on."""

from __future__ import annotations

import threading
from datetime import timedelta

import httpx
import orjson
import pytest
from sqlalchemy import func, select

from service import models
from tests.conftest import auth
from tests.factories import MONDAY_LOCAL_MIDNIGHT, count_items, make_detector, rfc3339


@pytest.fixture
def d1(engine):  # type: ignore[no-untyped-def]
    make_detector(engine, "D1")
    make_detector(engine, "D2")


def stored(engine) -> dict[tuple[str, int], int]:  # type: ignore[no-untyped-def]
    with engine.connect() as conn:
        rows = conn.execute(select(models.counts.c.detector_id, models.counts.c.start_s,
                                   models.counts.c.count)).all()
    return {(r.detector_id, r.start_s): r.count for r in rows}


def post(client, keys, items, **kw):  # type: ignore[no-untyped-def]
    return client.post("/v1/counts", json={"counts": items}, headers=auth(keys["ingest"]), **kw)


def test_post_counts_stores_every_item_and_returns_200(client, keys, engine, d1) -> None:
    """A clean batch is stored in full and answered 200 with accepted = items."""
    r = post(client, keys, count_items("D1", n=12) + count_items("D2", n=12))
    assert r.status_code == 200, r.text
    assert r.json()["accepted"] == 24 and r.json()["rejected"] == 0
    assert len(stored(engine)) == 24


def test_post_counts_resend_is_idempotent_duplicate(client, keys, engine, d1) -> None:
    """Resending a stored batch is a 200 of duplicates and stores nothing twice."""
    items = count_items("D1", n=10)
    assert post(client, keys, items).status_code == 200
    r = post(client, keys, items)
    assert r.status_code == 200
    assert r.json()["accepted"] == 0 and r.json()["duplicate"] == 10
    assert len(stored(engine)) == 10


def test_post_counts_same_item_twice_in_one_batch_is_one_row(client, keys, engine, d1) -> None:
    """An item repeated inside one batch is stored once and counted as a duplicate."""
    items = count_items("D1", n=3)
    r = post(client, keys, items + [items[0]])
    assert r.status_code == 200
    assert r.json()["accepted"] == 3 and r.json()["duplicate"] == 1
    assert len(stored(engine)) == 3


def test_post_counts_conflicting_value_is_kept_visible(client, keys, engine, d1) -> None:
    """A different value for a stored interval keeps the stored one, answers 409 and lists it."""
    items = count_items("D1", n=3)
    post(client, keys, items)
    changed = dict(items[1], count=items[1]["count"] + 5)
    r = post(client, keys, [items[0], changed])
    assert r.status_code == 409
    body = r.json()
    assert body["duplicate"] == 1 and body["conflict"] == 1
    assert body["conflicts"][0]["index"] == 1
    assert body["conflicts"][0]["stored"] == items[1]["count"]
    assert body["conflicts"][0]["offered"] == changed["count"]
    listed = client.get("/v1/counts/conflicts", headers=auth(keys["read"])).json()["data"]
    assert [(c["stored"], c["offered"]) for c in listed] == [(items[1]["count"], changed["count"])]
    assert stored(engine)[("D1", int(MONDAY_LOCAL_MIDNIGHT.timestamp()) + 300)] == items[1]["count"]


def test_post_counts_conflict_inside_one_batch_is_reported(client, keys, engine, d1) -> None:
    """Two different values for one interval in one batch: the first is stored, the second listed."""
    item = count_items("D1", n=1)[0]
    r = post(client, keys, [item, dict(item, count=item["count"] + 1)])
    assert r.status_code == 409
    assert r.json()["accepted"] == 1 and r.json()["conflicts"][0]["index"] == 1


BAD_ITEMS = [
    ({"count": -1}, "negative"),
    ({"count": 1.5}, "not an integer"),
    ({"count": "12"}, "not an integer"),
    ({"count": True}, "not an integer"),
    ({"count": 10**12}, "larger than"),
    ({"start": "2026-02-30T00:00:00Z"}, "not a valid date-time"),
    ({"start": "2026-11-16T06:00:00"}, "no UTC offset"),
    ({"start": "2026-11-16T06:00:01Z"}, "interval grid"),
    ({"start": "2099-01-01T00:00:00Z"}, "ahead of the server clock"),
    ({"detector_id": "NOPE"}, "unknown detector"),
    ({"detector_id": 7}, "not a string"),
]


@pytest.mark.parametrize(("change", "message"), BAD_ITEMS)
def test_post_counts_rejects_bad_item_and_keeps_valid_ones(client, keys, engine, d1, change,
                                                           message) -> None:
    """A bad item is rejected with a clear message (422) while its valid neighbours are stored."""
    items = count_items("D1", n=3)
    items[1] = {**items[1], **change}
    r = post(client, keys, items)
    assert r.status_code == 422, r.text
    body = r.json()
    assert body["accepted"] == 2 and body["rejected"] == 1
    assert body["errors"][0]["index"] == 1
    assert message in body["errors"][0]["error"]
    assert len(stored(engine)) == 2


def test_post_counts_item_missing_count_is_rejected(client, keys, d1) -> None:
    """An item without a count is rejected by name."""
    item = count_items("D1", n=1)[0]
    del item["count"]
    r = post(client, keys, [item])
    assert r.status_code == 422 and "count is missing" in r.json()["errors"][0]["error"]


def test_post_counts_empty_batch_is_422(client, keys, d1) -> None:
    """An empty batch says it is empty."""
    r = post(client, keys, [])
    assert r.status_code == 422 and "no items" in r.json()["message"]


def test_post_counts_over_item_limit_is_413_with_limit(client, keys, d1) -> None:
    """10,001 items exceed the default 10,000-item limit, stated in the answer."""
    items = [{"detector_id": "D1", "start": "2026-11-16T06:00:00Z", "count": 1}] * 10_001
    r = post(client, keys, items)
    assert r.status_code == 413
    assert "10,000" in r.json()["message"]


def test_post_counts_ten_thousand_items_is_accepted(client, keys, engine, d1) -> None:
    """A full 10,000-item batch is within the limit."""
    early = MONDAY_LOCAL_MIDNIGHT - timedelta(days=30)
    items = count_items("D1", n=5000, start=early) + count_items("D2", n=5000, start=early)
    r = post(client, keys, items)
    assert r.status_code == 200 and r.json()["accepted"] == 10_000


@pytest.mark.parametrize("body", [b"{not json", b"[1, 2", b"\xff\xfe"])
def test_post_counts_body_not_json_is_400(client, keys, d1, body) -> None:
    """A body that is not JSON gets 400 naming the expected shape."""
    r = client.post("/v1/counts", content=body, headers={**auth(keys["ingest"]),
                                                         "content-type": "application/json"})
    assert r.status_code == 400 and "JSON" in r.json()["message"]


@pytest.mark.parametrize("doc", [{"counts": "x"}, {"items": []}, 5, {"counts": [1, "a"]}])
def test_post_counts_wrong_json_shape_is_clear(client, keys, d1, doc) -> None:
    """Wrong JSON types are refused with a message, never a 500."""
    r = client.post("/v1/counts", content=orjson.dumps(doc),
                    headers={**auth(keys["ingest"]), "content-type": "application/json"})
    assert r.status_code in (400, 422)
    assert r.json()["message"] or r.json()["errors"]


def test_post_counts_csv_with_bom_and_crlf(client, keys, engine, d1) -> None:
    """CSV with a byte-order mark and Windows line endings is accepted."""
    lines = ["detector_id,start,count"] + [f"{i['detector_id']},{i['start']},{i['count']}"
                                           for i in count_items("D1", n=5)]
    body = ("\ufeff" + "\r\n".join(lines) + "\r\n").encode()
    r = client.post("/v1/counts", content=body,
                    headers={**auth(keys["ingest"]), "content-type": "text/csv"})
    assert r.status_code == 200, r.text
    assert r.json()["accepted"] == 5


def test_post_counts_csv_missing_column_is_400(client, keys, d1) -> None:
    """A CSV header without the count column names the missing column."""
    r = client.post("/v1/counts", content=b"detector_id,start\nD1,2026-11-16T06:00:00Z\n",
                    headers={**auth(keys["ingest"]), "content-type": "text/csv"})
    assert r.status_code == 400 and "count" in r.json()["message"]


def test_post_counts_csv_bad_number_is_rejected_by_row(client, keys, engine, d1) -> None:
    """A CSV row with a non-integer count is rejected; the others are stored."""
    body = b"detector_id,start,count\nD1,2026-11-16T06:00:00Z,3\nD1,2026-11-16T06:05:00Z,2.5\n"
    r = client.post("/v1/counts", content=body,
                    headers={**auth(keys["ingest"]), "content-type": "text/csv"})
    assert r.status_code == 422 and r.json()["accepted"] == 1
    assert r.json()["errors"][0]["index"] == 1


def test_post_counts_unsupported_content_type_is_415(client, keys, d1) -> None:
    """Only JSON and CSV bodies are accepted."""
    r = client.post("/v1/counts", content=b"<x/>",
                    headers={**auth(keys["ingest"]), "content-type": "application/xml"})
    assert r.status_code == 415 and "text/csv" in r.json()["message"]


def test_post_counts_oversized_body_is_413_before_parsing(client, keys, d1) -> None:
    """A body over the byte limit is refused with 413 and the limit."""
    r = client.post("/v1/counts", content=b" " * (5 * 1024 * 1024),
                    headers={**auth(keys["ingest"]), "content-type": "application/json"})
    assert r.status_code == 413 and "limit" in r.json()["message"]


def test_post_counts_misaligned_start_on_15_minute_detector(client, keys, engine) -> None:
    """Alignment is to the detector's own grid in local time."""
    make_detector(engine, "Q1", interval_s=900)
    ok = rfc3339(MONDAY_LOCAL_MIDNIGHT + timedelta(minutes=45))
    bad = rfc3339(MONDAY_LOCAL_MIDNIGHT + timedelta(minutes=50))
    r = post(client, keys, [{"detector_id": "Q1", "start": ok, "count": 4},
                            {"detector_id": "Q1", "start": bad, "count": 4}])
    assert r.status_code == 422
    assert r.json()["accepted"] == 1 and "900-second" in r.json()["errors"][0]["error"]


def test_get_counts_returns_stored_counts_in_order(client, keys, d1) -> None:
    """Stored counts read back in time order, UTC."""
    items = count_items("D1", n=4)
    post(client, keys, list(reversed(items)))
    r = client.get("/v1/counts", params={"detector_id": "D1"}, headers=auth(keys["read"]))
    assert [d["count"] for d in r.json()["data"]] == [i["count"] for i in items]


def test_concurrent_posts_of_same_batch_store_one_copy(live_server, keys, engine, d1) -> None:
    """Two clients posting the same batch at once through real HTTP: exactly one copy stored."""
    items = count_items("D1", n=500) + count_items("D2", n=500)
    results: list[httpx.Response] = []
    barrier = threading.Barrier(4)

    def send() -> None:
        with httpx.Client(base_url=live_server.url, timeout=60) as c:
            barrier.wait()
            results.append(c.post("/v1/counts", json={"counts": items},
                                  headers=auth(keys["ingest"])))

    threads = [threading.Thread(target=send) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert all(r.status_code == 200 for r in results), [r.text for r in results]
    assert sum(r.json()["accepted"] for r in results) == 1000
    assert sum(r.json()["duplicate"] for r in results) == 3000
    with engine.connect() as conn:
        assert conn.execute(select(func.count()).select_from(models.counts)).scalar_one() == 1000
