"""POST /v1/counts: every item stored once or reported, with a status a controller can act on."""

from __future__ import annotations

import gzip
import threading
from datetime import timedelta

import httpx
import orjson
import pytest
from sqlalchemy import func, select

from service.store import tables as models
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
    """A bad item is rejected with a clear message (422) while its valid neighbors are stored."""
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


def test_post_counts_item_with_unknown_field_is_rejected_by_name(client, keys, engine, d1) -> None:
    """An item with a field beyond detector_id, start and count (a typo such as "cnt") is
    rejected naming the field; its valid neighbors are stored."""
    items = count_items("D1", n=3)
    items[1]["cnt"] = items[1].pop("count")
    r = post(client, keys, items)
    assert r.status_code == 422, r.text
    [error] = r.json()["errors"]
    assert error["index"] == 1 and "unknown field 'cnt'" in error["error"]
    assert "detector_id, start and count" in error["error"]
    assert len(stored(engine)) == 2


def test_post_counts_unknown_top_level_field_is_422_naming_it(client, keys, engine, d1) -> None:
    """A batch object with a field beside "counts" is refused whole, naming the field."""
    r = client.post("/v1/counts", json={"counts": count_items("D1", n=2), "detector": "D1"},
                    headers=auth(keys["ingest"]))
    assert r.status_code == 422, r.text
    assert "unknown field 'detector'" in r.json()["message"]
    assert stored(engine) == {}


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


# ---------------------------------------------------------------- one bad item never costs the batch

VALID_STARTS = ("2026-11-16T06:00:00Z", "2026-11-16T06:10:00Z")
BAD_START = "2026-11-16T06:05:00Z"  # on the grid: only the offered bad value is wrong


def json_batch(bad: tuple[str, str, str]) -> bytes:
    """A JSON body: valid item, the bad item from raw JSON tokens (detector_id, start, count),
    valid item. Raw tokens let a test send what orjson cannot (huge integers, lone surrogates)."""
    det, start, count = bad
    items = [f'{{"detector_id": "D1", "start": "{VALID_STARTS[0]}", "count": 7}}',
             '{"detector_id": ' + det + ', "start": ' + start + ', "count": ' + count + "}",
             f'{{"detector_id": "D1", "start": "{VALID_STARTS[1]}", "count": 9}}']
    return ('{"counts": [' + ", ".join(items) + "]}").encode()


def csv_batch(bad: tuple[str, str, str] | str) -> bytes:
    """A CSV body: header, valid line, the bad line (fields or a whole line), valid line."""
    line = bad if isinstance(bad, str) else ",".join(bad)
    return (f"detector_id,start,count\nD1,{VALID_STARTS[0]},7\n{line}\n"
            f"D1,{VALID_STARTS[1]},9\n").encode()


def stored_over_http(client, keys) -> list[tuple[str, int]]:  # type: ignore[no-untyped-def]
    r = client.get("/v1/counts", params={"detector_id": "D1"}, headers=auth(keys["read"]))
    assert r.status_code == 200, r.text
    return [(d["start"], d["count"]) for d in r.json()["data"]]


def assert_bad_item_alone_rejected(client, keys, body: bytes, content_type: str,  # type: ignore[no-untyped-def]
                                   message: str) -> dict:
    """422 naming item 1 (and, for CSV, line 3); both valid items stored; a resend answers the
    same 422 with the valid items as duplicates."""
    headers = {**auth(keys["ingest"]), "content-type": content_type}
    r = client.post("/v1/counts", content=body, headers=headers)
    assert r.status_code == 422, r.text
    answer = r.json()
    assert (answer["accepted"], answer["rejected"]) == (2, 1), answer
    error = answer["errors"][0]
    assert error["index"] == 1
    assert message in error["error"], error["error"]
    if content_type == "text/csv":
        assert error["line"] == 3
    assert stored_over_http(client, keys) == [(VALID_STARTS[0], 7), (VALID_STARTS[1], 9)]
    again = client.post("/v1/counts", content=body, headers=headers)
    assert again.status_code == 422, again.text
    assert (again.json()["duplicate"], again.json()["rejected"]) == (2, 1)
    return error


LONG_DIGITS = "9" * 5000  # past Python's 4,300-digit int() limit
NON_ASCII_DIGITS = "\u00b2"  # SUPERSCRIPT TWO: str.isdigit() is True, int() refuses it
FULL_WIDTH_12 = "\uff11\uff12"

# (detector_id, start, count) as raw JSON tokens, and the message expected
JSON_TRIGGERS = {
    "count_superscript_two": ('"D1"', f'"{BAD_START}"', f'"{NON_ASCII_DIGITS}"', "not an integer"),
    "count_5000_digits": ('"D1"', f'"{BAD_START}"', LONG_DIGITS, "5,000-digit number"),
    "count_negative_5000_digits": ('"D1"', f'"{BAD_START}"', "-" + LONG_DIGITS,
                                   "5,000-digit number"),
    "count_30_digits": ('"D1"', f'"{BAD_START}"', "9" * 30, "larger than 1,000,000"),
    "start_year_1": ('"D1"', '"0001-01-01T00:00:00Z"', "5", "outside the accepted range"),
    "start_year_1_east_offset": ('"D1"', '"0001-01-01T00:00:00+01:00"', "5",
                                 "outside the accepted range"),
    "start_year_9999_west_offset": ('"D1"', '"9999-12-31T23:55:00-23:59"', "5",
                                    "outside the accepted range"),
    "start_before_1990": ('"D1"', '"1989-12-31T23:55:00Z"', "5", "1990-01-01T00:00:00Z"),
    "start_full_width_digits": ('"D1"', '"\uff12\uff10\uff12\uff16-11-16T06:05:00Z"', "5",
                                "not an RFC 3339"),
    "start_5000_digit_fraction": ('"D1"', '"2026-11-16T06:05:00.' + "0" * 5000 + 'Z"', "5",
                                  "not an RFC 3339"),
    "detector_id_nul": ('"D1\\u0000"', f'"{BAD_START}"', "5", "U+0000"),
    "detector_id_tab": ('"D\\t1"', f'"{BAD_START}"', "5", "U+0009"),
    "detector_id_lone_surrogate": ('"D\\ud800"', f'"{BAD_START}"', "5", "U+D800"),
    "detector_id_200000_chars": ('"' + "D" * 200_000 + '"', f'"{BAD_START}"', "5",
                                 "200,000 characters long"),
    "start_nul": ('"D1"', '"2026-11-16T06:05:00Z\\u0000"', "5", "not an RFC 3339"),
}


@pytest.mark.parametrize("name", sorted(JSON_TRIGGERS))
def test_post_counts_json_bad_value_rejected_alone(client, keys, d1, name) -> None:
    """A JSON item the database could not hold is rejected by index; its neighbors are stored."""
    det, start, count, message = JSON_TRIGGERS[name]
    assert_bad_item_alone_rejected(client, keys, json_batch((det, start, count)),
                                   "application/json", message)


# (detector_id, start, count) CSV fields, or a whole bad line, and the message expected
CSV_TRIGGERS = {
    "count_superscript_two": (("D1", BAD_START, NON_ASCII_DIGITS), "not a whole number"),
    "count_full_width_digits": (("D1", BAD_START, FULL_WIDTH_12), "not a whole number"),
    "count_5000_digits": (("D1", BAD_START, LONG_DIGITS[:4000]), "4,000-digit number"),
    "count_30_digits": (("D1", BAD_START, "9" * 30), "30-digit number"),
    "count_decimal": (("D1", BAD_START, "2.5"), "not a whole number"),
    "start_year_1": (("D1", "0001-01-01T00:00:00Z", "5"), "outside the accepted range"),
    "start_year_1_east_offset": (("D1", "0001-01-01T00:00:00+01:00", "5"),
                                 "outside the accepted range"),
    "start_after_2100": (("D1", "2100-01-01T00:00:00Z", "5"), "2100-01-01T00:00:00Z"),
    "detector_id_nul": (("D1\x00", BAD_START, "5"), "U+0000"),
    "detector_id_tab": (("D\t1", BAD_START, "5"), "U+0009"),
    "field_over_128_kib": (("D" * 140_000, BAD_START, "5"), "lines are at most 4,096"),
    "quoted_field_over_128_kib": ('D1,"' + "x" * 140_000 + '",5', "lines are at most 4,096"),
    "line_4097_chars": (("D1", BAD_START, "5" + " " * (4097 - len(f"D1,{BAD_START},5"))),
                        "4,097 characters long; lines are at most 4,096"),
    "broken_quoting": ('D1,"2026-11-16T06:05:00Z"x,5', "malformed CSV"),
    "too_few_fields": ("D1;2026-11-16T06:05:00Z;5", "has 1 field(s)"),
}


@pytest.mark.parametrize("name", sorted(CSV_TRIGGERS))
def test_post_counts_csv_bad_line_rejected_alone(client, keys, d1, name) -> None:
    """A CSV line the database could not hold is rejected by index and line; the others stored."""
    bad, message = CSV_TRIGGERS[name]
    assert_bad_item_alone_rejected(client, keys, csv_batch(bad), "text/csv", message)


def test_post_counts_csv_count_limit_checked_before_int(client, keys, d1) -> None:
    """A 4,096-character line holding a 4,060-digit count (past int()'s 4,300 limit only with
    more digits, so also try the longest that fits a line) is a rejected item, not a 500."""
    count = "1" * (4096 - len(f"D1,{BAD_START},"))
    assert_bad_item_alone_rejected(client, keys, csv_batch(("D1", BAD_START, count)), "text/csv",
                                   f"{len(count):,}-digit number")


def test_post_counts_quoted_field_across_lines_is_rejected_by_line(client, keys, d1) -> None:
    """A quoted field cannot run across lines: both pieces are rejected, the valid lines stored."""
    body = (f'detector_id,start,count\nD1,{VALID_STARTS[0]},7\nD1,"{BAD_START}\n",5\n'
            f"D1,{VALID_STARTS[1]},9\n").encode()
    r = client.post("/v1/counts", content=body,
                    headers={**auth(keys["ingest"]), "content-type": "text/csv"})
    assert r.status_code == 422, r.text
    assert [(e["index"], e["line"]) for e in r.json()["errors"]] == [(1, 3), (2, 4)]
    assert all("malformed CSV" in e["error"] for e in r.json()["errors"])
    assert stored_over_http(client, keys) == [(VALID_STARTS[0], 7), (VALID_STARTS[1], 9)]


def test_post_counts_start_window_edges(client, keys, engine) -> None:
    """The first accepted start is 1990-01-01T00:00:00Z; the last second before 2100 is refused
    only by the clock, not the window (here: by the future tolerance)."""
    make_detector(engine, "U1", timezone="UTC", holiday_calendar=None)
    r = post(client, keys, [{"detector_id": "U1", "start": "1990-01-01T00:00:00Z", "count": 1},
                            {"detector_id": "U1", "start": "1989-12-31T23:55:00Z", "count": 1}])
    assert r.status_code == 422 and r.json()["accepted"] == 1
    assert r.json()["errors"][0]["index"] == 1
    assert "1990-01-01T00:00:00Z up to" in r.json()["errors"][0]["error"]


def test_post_counts_rejected_item_echo_is_cut_and_json_safe(client, keys, d1) -> None:
    """A rejected item's echoed detector_id is at most 100 characters plus an ellipsis."""
    error = assert_bad_item_alone_rejected(
        client, keys, json_batch(('"' + "D" * 200_000 + '"', f'"{BAD_START}"', "5")),
        "application/json", "characters long")
    assert error["detector_id"] == "D" * 100 + "..."


def test_post_counts_nul_detector_id_on_its_own_is_422(client, keys, d1) -> None:
    """A batch whose only item has a NUL in detector_id is a 422 naming it, never a 500."""
    r = client.post("/v1/counts", content=b'{"counts": [{"detector_id": "\\u0000", '
                    b'"start": "2026-11-16T06:05:00Z", "count": 1}]}',
                    headers={**auth(keys["ingest"]), "content-type": "application/json"})
    assert r.status_code == 422 and "U+0000" in r.json()["errors"][0]["error"]


def test_post_counts_json_nan_is_400_not_500(client, keys, d1) -> None:
    """NaN is not JSON: the body is refused as a whole with 400."""
    r = client.post("/v1/counts", content=json_batch(('"D1"', f'"{BAD_START}"', "NaN")),
                    headers={**auth(keys["ingest"]), "content-type": "application/json"})
    assert r.status_code == 400 and "not valid JSON" in r.json()["message"]


def test_post_counts_gzip_body_is_415_naming_gzip(client, keys, d1) -> None:
    """A gzip-compressed body (without Content-Encoding) is refused as gzip, not as bad JSON."""
    body = gzip.compress(orjson.dumps({"counts": count_items("D1", n=2)}))
    r = client.post("/v1/counts", content=body,
                    headers={**auth(keys["ingest"]), "content-type": "application/json"})
    assert r.status_code == 415 and "gzip is not accepted" in r.json()["message"]


def test_post_counts_content_encoding_gzip_is_415(client, keys, d1) -> None:
    """Content-Encoding: gzip is refused with 415 saying gzip is not accepted."""
    body = gzip.compress(csv_batch(("D1", BAD_START, "5")))
    r = client.post("/v1/counts", content=body, headers={
        **auth(keys["ingest"]), "content-type": "text/csv", "content-encoding": "GZIP"})
    assert r.status_code == 415 and "gzip is not accepted" in r.json()["message"]


@pytest.mark.parametrize("content_type", ["APPLICATION/JSON", "Application/Json; charset=UTF-8"])
def test_post_counts_media_type_is_case_insensitive_json(client, keys, d1, content_type) -> None:
    """Media types are case-insensitive: APPLICATION/JSON is JSON."""
    r = client.post("/v1/counts", content=orjson.dumps({"counts": count_items("D1", n=3)}),
                    headers={**auth(keys["ingest"]), "content-type": content_type})
    assert r.status_code == 200, r.text
    assert len(stored_over_http(client, keys)) == 3


def test_post_counts_media_type_is_case_insensitive_csv(client, keys, d1) -> None:
    """Media types are case-insensitive: Text/CSV is CSV."""
    r = client.post("/v1/counts", content=csv_batch(("D1", BAD_START, "5")),
                    headers={**auth(keys["ingest"]), "content-type": "Text/CSV; Charset=utf-8"})
    assert r.status_code == 200, r.text
    assert len(stored_over_http(client, keys)) == 3


def test_post_counts_inserts_in_canonical_order(engine, d1) -> None:
    """Whatever order a batch is sent in, rows reach the database sorted by (detector, start)."""
    from sqlalchemy import event

    from service.pipeline import ingest

    seen: list[list] = []

    def capture(conn, cursor, statement, parameters, context, executemany):  # type: ignore[no-untyped-def]
        if statement.startswith("INSERT INTO counts"):
            seen.append(list(parameters))

    items = count_items("D2", n=6) + count_items("D1", n=6)
    raw = [(i, it["detector_id"], it["start"], it["count"]) for i, it in enumerate(reversed(items))]
    event.listen(engine, "before_cursor_execute", capture)
    try:
        result = ingest.ingest_items(engine, raw, future_tolerance_s=300)
    finally:
        event.remove(engine, "before_cursor_execute", capture)
    assert result.accepted == 12
    keys_sent = [(row[0], row[1]) for row in seen[0]]
    assert keys_sent == sorted(keys_sent) and len(keys_sent) == 12
