"""GET /v1/counts and /v1/counts/conflicts: pages bounded in rows and bytes with a cursor to
the rest, and parameters checked against what the database holds."""

from __future__ import annotations

from datetime import timedelta

import orjson
import pytest
from starlette.testclient import TestClient

from service.config import Settings
from service.web.app import create_app
from tests.conftest import auth
from tests.factories import MONDAY_LOCAL_MIDNIGHT, count_items, make_detector, rfc3339


@pytest.fixture
def d1_with_counts(client, engine, keys):  # type: ignore[no-untyped-def]
    make_detector(engine, "D1")
    items = count_items("D1", n=500)
    r = client.post("/v1/counts", json={"counts": items}, headers=auth(keys["ingest"]))
    assert r.status_code == 200
    return items


def read_all(client, key: str, **params) -> tuple[list[dict], int]:  # type: ignore[no-untyped-def]
    """Every row by following next_from; (rows, pages)."""
    rows: list[dict] = []
    pages = 0
    query = {"detector_id": "D1", **params}
    while True:
        r = client.get("/v1/counts", params=query, headers=auth(key))
        assert r.status_code == 200, r.text
        body = r.json()
        rows += body["data"]
        pages += 1
        if body["next_from"] is None:
            return rows, pages
        assert pages < 1000  # a bound on the loop: a cursor that never ends fails here
        query["from"] = body["next_from"]


def test_get_counts_page_within_limit_has_no_cursor(client, keys, d1_with_counts) -> None:
    """A read that fits its limit returns every row and next_from null."""
    body = client.get("/v1/counts", params={"detector_id": "D1", "limit": 500},
                      headers=auth(keys["read"])).json()
    assert [(r["start"], r["count"]) for r in body["data"]] == \
        [(i["start"], i["count"]) for i in d1_with_counts]
    assert body["next_from"] is None and body["detector_id"] == "D1"


def test_get_counts_cut_at_limit_says_where_to_go_on(client, keys, d1_with_counts) -> None:
    """A page cut at `limit` gives next_from = the next row's start; following it reads every
    row once, in order."""
    body = client.get("/v1/counts", params={"detector_id": "D1", "limit": 120},
                      headers=auth(keys["read"])).json()
    assert len(body["data"]) == 120 and body["next_from"] == d1_with_counts[120]["start"]
    rows, pages = read_all(client, keys["read"], limit=120)
    assert pages == 5
    assert [r["start"] for r in rows] == [i["start"] for i in d1_with_counts]


def test_get_counts_page_is_cut_by_bytes_with_a_cursor(database_url, engine, keys) -> None:
    """With a small page size in bytes, a large limit still returns pages under that size, each
    with next_from, and together they hold every row exactly once."""
    settings = Settings(database_url=database_url, max_page_bytes=16 * 1024)
    with TestClient(create_app(settings, engine=engine)) as c:
        make_detector(engine, "D1")
        items = count_items("D1", n=2000)
        assert c.post("/v1/counts", json={"counts": items},
                      headers=auth(keys["ingest"])).status_code == 200
        r = c.get("/v1/counts", params={"detector_id": "D1", "limit": 100_000},
                  headers=auth(keys["read"]))
        first = r.json()
        data_bytes = len(orjson.dumps(first["data"]))
        assert 0 < len(first["data"]) < 2000 and data_bytes <= 16 * 1024
        assert first["next_from"] == items[len(first["data"])]["start"]
        rows, pages = read_all(c, keys["read"], limit=100_000)
    assert pages > 2
    assert [(r["start"], r["count"]) for r in rows] == [(i["start"], i["count"]) for i in items]


def test_get_counts_cursor_respects_until(client, keys, d1_with_counts) -> None:
    """Paging inside a from/until window stops at until."""
    until = rfc3339(MONDAY_LOCAL_MIDNIGHT + timedelta(seconds=300 * 250))
    rows, _ = read_all(client, keys["read"], limit=100, until=until)
    assert [r["start"] for r in rows] == [i["start"] for i in d1_with_counts[:250]]


@pytest.mark.parametrize("value", ["D\x001", "D1\n", "\x1b[31mD1"])
def test_get_counts_detector_id_with_control_characters_is_422(client, keys, value) -> None:
    """A detector id holding NUL or another control character is a clear 422."""
    r = client.get("/v1/counts", params={"detector_id": value}, headers=auth(keys["read"]))
    assert r.status_code == 422 and "control character" in r.json()["message"]


def test_get_counts_extreme_but_valid_times_are_an_empty_page(client, keys, engine) -> None:
    """from/until at the ends of RFC 3339's years are answered, not a database error."""
    make_detector(engine, "D1")
    r = client.get("/v1/counts", params={"detector_id": "D1", "from": "0001-01-01T00:00:00+01:00",
                                         "until": "9999-12-31T23:59:59-01:00"},
                   headers=auth(keys["read"]))
    assert r.status_code == 200 and r.json() == {"detector_id": "D1", "group": None, "data": [],
                                                 "next": None, "next_from": None}


@pytest.mark.parametrize("after", [str(2**31), str(2**63), "99999999999999999999999"])
def test_conflicts_cursor_beyond_the_id_column_is_422(client, keys, after) -> None:
    """The conflicts cursor is a 32-bit id column: past 2**31 - 1 is a 422, not a 500."""
    r = client.get("/v1/counts/conflicts", params={"after": after}, headers=auth(keys["read"]))
    assert r.status_code == 422 and "2147483647" in r.json()["message"]


def test_conflicts_cursor_at_the_top_of_the_range_is_an_empty_page(client, keys) -> None:
    """after = 2**31 - 1 is valid and simply past every conflict."""
    r = client.get("/v1/counts/conflicts", params={"after": str(2**31 - 1)},
                   headers=auth(keys["read"]))
    assert r.status_code == 200 and r.json()["data"] == []


def test_conflicts_detector_filter_with_nul_is_422(client, keys) -> None:
    """NUL in the conflicts filter is refused with a clear message."""
    r = client.get("/v1/counts/conflicts", params={"detector_id": "D\x00"},
                   headers=auth(keys["read"]))
    assert r.status_code == 422 and "control character" in r.json()["message"]
