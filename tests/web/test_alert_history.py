"""Alert handling an operator can audit: acknowledgements and notes are an append-only
history, an acknowledgement can be withdrawn, and the list filters by start time."""

from __future__ import annotations

import pytest

from service.timefmt import format_utc
from tests.conftest import auth
from tests.factories import make_detector
from tests.web.test_alerts import BASE_T, write_alert


def test_second_acknowledgement_appends_to_history(client, engine, keys) -> None:
    """Two acknowledgements and a note: all three kept in order (by, at, note, key); the
    acknowledgement in force is the latest."""
    make_detector(engine, "D1")
    alert_id = write_alert(engine, "D1", BASE_T)
    h = auth(keys["operate"])
    first = client.post(f"/v1/alerts/{alert_id}/acknowledge", headers=h,
                        json={"by": "TMC desk 2", "note": "crew dispatched"})
    assert first.status_code == 200, first.text
    client.post(f"/v1/alerts/{alert_id}/notes", headers=h,
                json={"by": "J. Ortega", "note": "cabinet door found open\nlatched it"})
    second = client.post(f"/v1/alerts/{alert_id}/acknowledge", headers=h,
                         json={"by": "night shift"})
    assert second.json()["seq"] > first.json()["seq"]
    got = client.get(f"/v1/alerts/{alert_id}", headers=auth(keys["read"])).json()
    assert [(e["action"], e["by"], e["note"], e["key"]) for e in got["history"]] == [
        ("acknowledge", "TMC desk 2", "crew dispatched", "operate-key"),
        ("note", "J. Ortega", "cabinet door found open\nlatched it", "operate-key"),
        ("acknowledge", "night shift", None, "operate-key"),
    ]
    assert all(e["at"].endswith("Z") for e in got["history"])
    assert got["acknowledged"]["by"] == "night shift"


def test_acknowledgement_can_be_withdrawn(client, engine, keys) -> None:
    """Un-acknowledging clears the acknowledgement in force and is itself a history entry;
    the earlier acknowledgement stays in the history."""
    make_detector(engine, "D1")
    alert_id = write_alert(engine, "D1", BASE_T)
    h = auth(keys["operate"])
    client.post(f"/v1/alerts/{alert_id}/acknowledge", headers=h, json={"by": "desk 1"})
    r = client.post(f"/v1/alerts/{alert_id}/unacknowledge", headers=h,
                    json={"by": "desk 1", "note": "wrong alert"})
    assert r.status_code == 200, r.text
    assert r.json()["acknowledged"] is None
    assert [e["action"] for e in r.json()["history"]] == ["acknowledge", "unacknowledge"]
    again = client.post(f"/v1/alerts/{alert_id}/unacknowledge", headers=h, json={"by": "desk 1"})
    assert again.status_code == 422


def test_unacknowledging_never_acknowledged_alert_is_clear_422(client, engine, keys) -> None:
    """Withdrawing an acknowledgement from an alert never acknowledged is a 422 that says so;
    the history stays empty."""
    make_detector(engine, "D1")
    alert_id = write_alert(engine, "D1", BASE_T)
    r = client.post(f"/v1/alerts/{alert_id}/unacknowledge", headers=auth(keys["operate"]),
                    json={"by": "desk 1"})
    assert r.status_code == 422
    assert r.json()["error"] == "not_acknowledged" and "not acknowledged" in r.json()["message"]
    got = client.get(f"/v1/alerts/{alert_id}", headers=auth(keys["read"])).json()
    assert got["history"] == [] and got["acknowledged"] is None


@pytest.mark.parametrize(("path", "body", "status"), [
    ("unacknowledge", {"by": "x"}, 404), ("notes", {"by": "x", "note": "y"}, 404),
    ("notes", {"by": "x"}, 422), ("notes", {"by": "x", "note": ""}, 422),
    ("notes", {"by": "x", "note": "a\x00b"}, 422),
])
def test_history_bad_input(client, engine, keys, path, body, status) -> None:
    """Notes need text without NUL; an unknown alert is a 404."""
    make_detector(engine, "D1")
    alert_id = write_alert(engine, "D1", BASE_T) if status != 404 else 999
    r = client.post(f"/v1/alerts/{alert_id}/{path}", headers=auth(keys["operate"]), json=body)
    assert r.status_code == status, r.text


def test_read_key_may_not_write_history(client, engine, keys) -> None:
    """Notes and acknowledgements need an operate (or admin) key."""
    make_detector(engine, "D1")
    alert_id = write_alert(engine, "D1", BASE_T)
    r = client.post(f"/v1/alerts/{alert_id}/notes", headers=auth(keys["read"]),
                    json={"by": "x", "note": "y"})
    assert r.status_code == 403


def test_alerts_filter_by_start_time(client, engine, keys) -> None:
    """start_after (inclusive) and start_before (exclusive) select alerts by start beside
    the seq cursor."""
    make_detector(engine, "D1")
    ids = [write_alert(engine, "D1", BASE_T + i * 3600) for i in range(4)]
    h = auth(keys["read"])
    page = client.get("/v1/alerts", headers=h, params={
        "start_after": format_utc(BASE_T + 3600), "start_before": format_utc(BASE_T + 3 * 3600)})
    assert [a["id"] for a in page.json()["data"]] == ids[1:3]
    later = client.get("/v1/alerts", headers=h, params={
        "start_after": format_utc(BASE_T + 3600), "after": page.json()["data"][0]["seq"]})
    assert [a["id"] for a in later.json()["data"]] == ids[2:]


@pytest.mark.parametrize(("params", "word"), [
    ({"start_after": "yesterday"}, "start_after"),
    ({"start_before": "2026-11-16T14:15:00"}, "start_before"),
    ({"start_after": "2026-11-16T15:00:00Z", "start_before": "2026-11-16T14:00:00Z"},
     "earlier"),
])
def test_alerts_bad_time_filter_is_clear_422(client, keys, params, word) -> None:
    """An unreadable time, one without an offset, or an empty range is a 422 naming it."""
    r = client.get("/v1/alerts", params=params, headers=auth(keys["read"]))
    assert r.status_code == 422 and word in r.json()["message"], r.text
