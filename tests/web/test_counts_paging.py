"""GET /v1/counts at scale: an opaque signed cursor (`next`) that never cuts silently, filters
by detector, group and time range, CSV on request; and CSV answers of the alert list and a
baseline day."""

from __future__ import annotations

import csv
import io

import pytest

from service.timefmt import format_utc
from service.web.paging import decode_cursor, encode_cursor
from tests.conftest import auth
from tests.factories import count_items, make_detector
from tests.web.test_alerts import BASE_T, write_alert


@pytest.fixture
def group_counts(client, engine, keys):  # type: ignore[no-untyped-def]
    """Two detectors of group G-A (50 and 30 counts) and one of G-B (20)."""
    make_detector(engine, "A1", group="G-A")
    make_detector(engine, "A2", group="G-A")
    make_detector(engine, "B1", group="G-B")
    stored = {"A1": count_items("A1", n=50), "A2": count_items("A2", n=30),
              "B1": count_items("B1", n=20)}
    for items in stored.values():
        r = client.post("/v1/counts", json={"counts": items}, headers=auth(keys["ingest"]))
        assert r.status_code == 200
    return stored


def follow(client, key: str, params: dict, *, csv_pages: bool = False  # type: ignore[no-untyped-def]
           ) -> tuple[list[tuple[str, str, int]], int]:
    """Every row by following the cursor; (rows, pages)."""
    rows: list[tuple[str, str, int]] = []
    query = dict(params)
    headers = {**auth(key), **({"Accept": "text/csv"} if csv_pages else {})}
    for pages in range(1, 1000):  # a bound: a cursor that never ends fails here
        r = client.get("/v1/counts", params=query, headers=headers)
        assert r.status_code == 200, r.text
        if csv_pages:
            assert r.headers["content-type"].startswith("text/csv")
            lines = list(csv.reader(io.StringIO(r.text)))
            assert lines[0] == ["detector_id", "start", "count", "flag"]
            assert all(f == "ok" for *_, f in lines[1:])  # no scoring ran: every row is ok
            rows += [(d, s, int(n)) for d, s, n, _ in lines[1:]]
            cursor = r.headers.get("tallyward-next-cursor")
        else:
            body = r.json()
            assert all(x["flag"] == "ok" for x in body["data"])
            rows += [(x["detector_id"], x["start"], x["count"]) for x in body["data"]]
            cursor = body["next"]
        if cursor is None:
            return rows, pages
        query["cursor"] = cursor
    raise AssertionError("the cursor did not end")


def expected(stored: dict, *dets: str) -> list[tuple[str, str, int]]:  # type: ignore[type-arg]
    return [(d, i["start"], i["count"]) for d in sorted(dets) for i in stored[d]]


def test_group_filter_pages_through_every_member_once(client, keys, group_counts) -> None:
    """A group's counts, 7 rows a page, come in (detector, start) order, each row once, and
    the last page's `next` is null."""
    rows, pages = follow(client, keys["read"], {"group": "G-A", "limit": 7})
    assert rows == expected(group_counts, "A1", "A2")
    assert pages == -(-80 // 7)


def test_all_detectors_and_time_range(client, keys, group_counts) -> None:
    """Without a detector or group every detector is read; from/until cut by start."""
    rows, _ = follow(client, keys["read"], {"limit": 33})
    assert rows == expected(group_counts, "A1", "A2", "B1")
    lo, hi = group_counts["A1"][10]["start"], group_counts["A1"][20]["start"]
    rows, _ = follow(client, keys["read"], {"from": lo, "until": hi, "limit": 4})
    assert rows == [r for r in expected(group_counts, "A1", "A2", "B1") if lo <= r[1] < hi]
    assert len(rows) == 30


def test_a_cut_page_always_says_so(client, keys, group_counts) -> None:
    """A page cut at `limit` has a cursor (JSON `next`; CSV header and Link), never a silent
    cut; with one detector `next_from` names the next start too."""
    body = client.get("/v1/counts", params={"detector_id": "A1", "limit": 10},
                      headers=auth(keys["read"])).json()
    assert len(body["data"]) == 10 and body["next"]
    assert body["next_from"] == group_counts["A1"][10]["start"]
    r = client.get("/v1/counts", params={"detector_id": "A1", "limit": 10},
                   headers={**auth(keys["read"]), "Accept": "text/csv"})
    assert r.text.count("\r\n") == 11
    assert r.headers["tallyward-next-cursor"]
    assert r.headers["link"].startswith("</v1/counts?") and 'rel="next"' in r.headers["link"]


def test_csv_pages_hold_the_same_rows_as_json(client, keys, group_counts) -> None:
    """Accept: text/csv answers RFC 4180 CSV; its pages hold exactly the JSON pages' rows."""
    as_csv, _ = follow(client, keys["read"], {"limit": 9}, csv_pages=True)
    as_json, _ = follow(client, keys["read"], {"limit": 9})
    assert as_csv == as_json == expected(group_counts, "A1", "A2", "B1")


@pytest.mark.parametrize("accept, is_csv", [
    ("text/csv", True), ("application/json", False), ("text/csv;q=0.5, application/json", False),
    ("application/json;q=0.2, text/csv", True), ("text/html,*/*;q=0.8", False), ("*/*", False),
])
def test_accept_header_chooses_the_format(client, keys, group_counts, accept, is_csv) -> None:
    """CSV is served when the Accept header prefers it (q-values), JSON otherwise."""
    r = client.get("/v1/counts", params={"detector_id": "B1"},
                   headers={**auth(keys["read"]), "Accept": accept})
    assert r.status_code == 200
    assert r.headers["content-type"].startswith("text/csv" if is_csv else "application/json")


def _tampered(cursor: str) -> list[str]:
    body, tag = cursor.split(".")
    flip = "A" if body[5] != "A" else "B"
    return [body[:5] + flip + body[6:] + "." + tag, body + "." + tag[:-2] + "AA",
            body + "." + tag + "x", "not-a-cursor", cursor + "." + tag, ""]


def test_tampered_cursor_is_a_clear_422(client, keys, group_counts) -> None:
    """A cursor with one character changed, a cut or forged tag, or plain garbage is refused
    with 422 saying to pass `next` unchanged; it is never read as another position."""
    first = client.get("/v1/counts", params={"group": "G-A", "limit": 5},
                       headers=auth(keys["read"])).json()
    for bad in _tampered(first["next"]):
        r = client.get("/v1/counts", params={"group": "G-A", "limit": 5, "cursor": bad},
                       headers=auth(keys["read"]))
        assert r.status_code == 422, (bad, r.text)
        assert r.json()["error"] == "validation_failed"
        assert "cursor" in r.json()["message"]


def test_cursor_with_other_filters_is_422(client, keys, group_counts) -> None:
    """A cursor belongs to its query: used with another group or time range it is 422."""
    first = client.get("/v1/counts", params={"group": "G-A", "limit": 5},
                       headers=auth(keys["read"])).json()
    for other in ({"group": "G-B"}, {"group": "G-A", "from": "2026-11-16T06:00:00Z"}, {}):
        r = client.get("/v1/counts", params={**other, "cursor": first["next"]},
                       headers=auth(keys["read"]))
        assert r.status_code == 422 and "other filters" in r.json()["message"], other


def test_cursor_signed_with_another_secret_is_refused() -> None:
    """A cursor is checked with the deployment's secret: another secret's cursor is refused."""
    from service.config import Settings
    from service.errors import ValidationFailed

    mine = Settings(page_cursor_secret="x" * 32)
    theirs = Settings(page_cursor_secret="y" * 32)
    query = {"detector_id": "A1", "group": None, "from": None, "until": None}
    cursor = encode_cursor(mine, query=query, position=["A1", 100])
    assert decode_cursor(mine, cursor, query=query) == ["A1", 100]
    with pytest.raises(ValidationFailed):
        decode_cursor(theirs, cursor, query=query)


def test_unknown_group_is_404(client, keys, group_counts) -> None:
    """A group no detector belongs to is 404 naming it, not an empty page."""
    r = client.get("/v1/counts", params={"group": "G-NONE"}, headers=auth(keys["read"]))
    assert r.status_code == 404 and "G-NONE" in r.json()["message"]


def test_alert_list_as_csv(client, engine, keys) -> None:
    """GET /v1/alerts with Accept: text/csv lists the same alerts as JSON, one row each, and
    says where to poll on; a text cell a spreadsheet would run as a formula is defused."""
    make_detector(engine, "D1")
    write_alert(engine, "D1", BASE_T)
    write_alert(engine, "D1", BASE_T + 3600, summary="=HYPERLINK(\"x\")")
    r = client.get("/v1/alerts", headers={**auth(keys["read"]), "Accept": "text/csv"})
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/csv")
    rows = list(csv.DictReader(io.StringIO(r.text)))
    listed = client.get("/v1/alerts", headers=auth(keys["read"])).json()
    assert [int(row["id"]) for row in rows] == [a["id"] for a in listed["data"]]
    assert rows[0]["kind"] == "zero_counts" and rows[0]["detector_id"] == "D1"
    assert rows[1]["summary"] == "'=HYPERLINK(\"x\")"
    assert r.headers["tallyward-next-after"] == str(listed["next_after"])


@pytest.fixture
def fitted_network(engine, settings):  # type: ignore[no-untyped-def]
    """Three detectors with 3 weeks of history, fitted (in this process)."""
    from service.pipeline import fit as fitting
    from tests.factories import load_network, small_network

    net = small_network(("bra3-nb-lt", "bra3-nb-t1", "bra3-nb-t2"))
    load_network(engine, net, until_s=net.test_start_s)
    results = fitting.fit_many(settings, engine, as_of_s=net.test_start_s, workers=1)
    assert [r["status"] for r in results] == ["fitted"] * 3
    return results


def test_baseline_day_as_csv(client, keys, fitted_network) -> None:
    """A day's baseline with Accept: text/csv has one row per interval with the same figures
    as the JSON answer."""
    params = {"date": "2026-11-17"}
    as_json = client.get("/v1/detectors/bra3-nb-t1/baseline", params=params,
                         headers=auth(keys["read"])).json()
    r = client.get("/v1/detectors/bra3-nb-t1/baseline", params=params,
                   headers={**auth(keys["read"]), "Accept": "text/csv"})
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/csv")
    assert "attachment" in r.headers["content-disposition"]
    rows = list(csv.DictReader(io.StringIO(r.text)))
    assert len(rows) == len(as_json["data"]) == 288
    for row, point in zip(rows, as_json["data"], strict=True):
        assert row["detector_id"] == "bra3-nb-t1" and row["day_type"] == "weekday"
        assert row["start"] == point["start"] and int(row["low"]) == point["low"]
        assert float(row["expected"]) == pytest.approx(point["expected"])


def test_fit_durations_reach_the_metrics(client, engine, keys) -> None:
    """Fits run as a job (by whichever process runs it) appear in the fit summary: one per
    detector, with the seconds the job items recorded."""
    from sqlalchemy import func, select

    from service.store import tables
    from tests.factories import load_network, small_network
    from tests.web.test_baselines import fit_job
    from tests.web.test_metrics import scrape

    net = small_network(("bra3-nb-lt", "bra3-nb-t1", "bra3-nb-t2"))
    load_network(engine, net, until_s=net.test_start_s)
    job = fit_job(client, keys, {"as_of": format_utc(net.test_start_s)})
    assert job["state"] == "done", job
    with engine.connect() as conn:
        recorded = conn.execute(select(func.sum(tables.job_items.c.seconds))).scalar_one()
    got = scrape(client, keys["read"])
    assert got[("tallyward_fit_duration_seconds_count", ())] == 3
    assert got[("tallyward_fit_duration_seconds_sum", ())] == pytest.approx(recorded)
