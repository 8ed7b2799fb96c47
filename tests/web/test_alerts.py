"""GET /v1/alerts for dashboards that poll: seq order, ETags, acknowledgement, bad input,
and no missed change with concurrent writers (PostgreSQL)."""

from __future__ import annotations

import random
import threading
import time

import httpx
import pytest

from service.store.engine import write_transaction
from service.store.scoring import AlertWriter
from tests.conftest import PG_URL, auth
from tests.factories import make_detector

BASE_T = 1_794_838_500  # 2026-11-16T14:15:00Z


def alert_values(detector_id: str, start_s: int, **extra) -> dict:  # type: ignore[no-untyped-def]
    values = {"subject": detector_id, "detector_id": detector_id, "group_id": "G-ELM-NB",
              "kind": "zero_counts", "cause": "detector", "status": "open", "start_s": start_s,
              "end_s": start_s + 600, "closed_s": None, "observed": 0.0, "expected": 120.0,
              "log_p": -120.0, "n_intervals": 3, "baseline_id": None, "detectors": None,
              "part_of": None, "summary": "test alert"}
    values.update(extra)
    return values


def write_alert(engine, detector_id: str, start_s: int, **extra) -> int:  # type: ignore[no-untyped-def]
    with write_transaction(engine) as conn:
        writer = AlertWriter(conn, time.time())
        return writer.upsert(None, alert_values(detector_id, start_s, **extra))


@pytest.mark.parametrize("params", [
    {"after": "-1"}, {"after": "abc"}, {"limit": "0"}, {"limit": str(10**9)},
    {"kind": "dead"}, {"status": "maybe"},
])
def test_alerts_bad_query_is_clear_422(client, keys, params) -> None:
    """Bad polling parameters get a 422 that names the parameter."""
    r = client.get("/v1/alerts", params=params, headers=auth(keys["read"]))
    assert r.status_code == 422, r.text
    name = next(iter(params))
    assert name in r.json()["message"]


def test_alerts_unknown_detector_is_404(client, keys) -> None:
    """Filtering on an unknown detector is a 404, not an empty page."""
    r = client.get("/v1/alerts", params={"detector_id": "NOPE"}, headers=auth(keys["read"]))
    assert r.status_code == 404


def test_alerts_come_in_seq_order_and_next_after_pages(client, engine, keys) -> None:
    """Each create and change gets a new, larger seq; polling with next_after pages through."""
    make_detector(engine, "D1")
    for i in range(5):
        write_alert(engine, "D1", BASE_T + i * 3600)
    h = auth(keys["read"])
    page = client.get("/v1/alerts", params={"limit": 2}, headers=h).json()
    assert [a["seq"] for a in page["data"]] == [1, 2]
    rest = client.get("/v1/alerts", params={"after": page["next_after"]}, headers=h).json()
    assert [a["seq"] for a in rest["data"]] == [3, 4, 5]
    assert rest["data"][0]["kind"] == "zero_counts" and rest["data"][0]["score"] == pytest.approx(52.12, abs=0.01)
    empty = client.get("/v1/alerts", params={"after": rest["next_after"]}, headers=h).json()
    assert empty["data"] == [] and empty["next_after"] == 5


def test_alerts_etag_gives_304_until_something_changes(client, engine, keys) -> None:
    """If-None-Match with the last ETag answers 304 until an alert changes."""
    make_detector(engine, "D1")
    write_alert(engine, "D1", BASE_T)
    h = auth(keys["read"])
    first = client.get("/v1/alerts", headers=h)
    etag = first.headers["etag"]
    assert client.get("/v1/alerts", headers={**h, "If-None-Match": etag}).status_code == 304
    write_alert(engine, "D1", BASE_T + 7200)
    assert client.get("/v1/alerts", headers={**h, "If-None-Match": etag}).status_code == 200


def test_acknowledge_needs_operate_and_shows_on_the_alert(client, engine, keys) -> None:
    """Acknowledging records who and why, gives a new seq, and needs the operate role."""
    make_detector(engine, "D1")
    alert_id = write_alert(engine, "D1", BASE_T)
    body = {"by": "tmc-desk-2", "note": "crew sent"}
    r = client.post(f"/v1/alerts/{alert_id}/acknowledge", json=body, headers=auth(keys["read"]))
    assert r.status_code == 403
    r = client.post(f"/v1/alerts/{alert_id}/acknowledge", json=body, headers=auth(keys["operate"]))
    assert r.status_code == 200, r.text
    assert r.json()["acknowledged"]["by"] == "tmc-desk-2" and r.json()["seq"] == 2
    assert r.json()["status"] == "open"
    r = client.post("/v1/alerts/999/acknowledge", json=body, headers=auth(keys["operate"]))
    assert r.status_code == 404


def test_acknowledge_does_not_stop_an_alert_from_closing(client, engine, keys) -> None:
    """A later close keeps the acknowledgement on the alert."""
    make_detector(engine, "D1")
    alert_id = write_alert(engine, "D1", BASE_T)
    client.post(f"/v1/alerts/{alert_id}/acknowledge", json={"by": "desk"},
                headers=auth(keys["operate"]))
    from sqlalchemy import select

    from service.store import tables as models

    with write_transaction(engine) as conn:
        row = conn.execute(select(models.alerts).where(models.alerts.c.alert_id == alert_id)).first()
        AlertWriter(conn, time.time()).upsert(row, {"status": "closed",
                                                         "closed_s": BASE_T + 1800})
    a = client.get(f"/v1/alerts/{alert_id}", headers=auth(keys["read"])).json()
    assert a["status"] == "closed" and a["acknowledged"]["by"] == "desk"


@pytest.mark.skipif(not PG_URL, reason="the visibility race needs PostgreSQL's concurrent writers")
def test_poller_sees_every_change_once_with_concurrent_writers(database_url, engine, keys,
                                                               live_server) -> None:
    """Several writers change alerts at once, each holding its transaction open after drawing
    seq numbers; a poller over real HTTP must see every alert's final state, seqs strictly
    increasing, none twice."""
    if not database_url.startswith("postgresql"):
        pytest.skip("PostgreSQL only")
    for d in range(4):
        make_detector(engine, f"W{d}")
    stop = threading.Event()
    seen: list[tuple[int, int]] = []
    errors: list[str] = []

    def writer(worker: int) -> None:
        rng = random.Random(worker)
        from sqlalchemy import select

        from service.store import tables as models

        for i in range(25):
            with write_transaction(engine) as conn:
                w = AlertWriter(conn, time.time())
                start = BASE_T + (worker * 1000 + i) * 600
                w.upsert(None, alert_values(f"W{worker}", start))
                if i and rng.random() < 0.5:
                    row = conn.execute(select(models.alerts).where(
                        models.alerts.c.subject == f"W{worker}").order_by(
                        models.alerts.c.alert_id).limit(1)).first()
                    w.upsert(row, {"n_intervals": row.n_intervals + 1})
                time.sleep(rng.random() * 0.03)  # commit late, after others drew larger seqs

    def poller() -> None:
        after = 0
        with httpx.Client(base_url=live_server.url, headers=auth(keys["read"]), timeout=30) as c:
            while True:
                done = stop.is_set()
                body = c.get("/v1/alerts", params={"after": after, "limit": 1000}).json()
                for a in body["data"]:
                    seen.append((a["id"], a["seq"]))
                if body["data"] and body["data"][0]["seq"] <= after:
                    errors.append("seq not increasing")
                after = body["next_after"]
                if done:
                    return
                time.sleep(0.005)

    threads = [threading.Thread(target=writer, args=(w,)) for w in range(4)]
    p = threading.Thread(target=poller)
    p.start()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    stop.set()
    p.join()
    assert not errors
    seqs = [s for _, s in seen]
    assert seqs == sorted(seqs) and len(seqs) == len(set(seqs))
    final = {}
    for alert_id, seq in seen:
        final[alert_id] = seq
    with engine.connect() as conn:
        rows = conn.exec_driver_sql("SELECT alert_id, seq FROM alerts").fetchall()
    assert len(rows) == 100
    assert {r[0]: r[1] for r in rows} == final  # every alert's last change was seen


@pytest.mark.parametrize("path", ["/v1/alerts/2147483648", "/v1/alerts/99999999999999999999"])
def test_alert_id_beyond_the_id_column_is_422(client, keys, path) -> None:
    """An alert id past 2**31 - 1 (the id column's range) is a clear 422, not a database error."""
    r = client.get(path, headers=auth(keys["read"]))
    assert r.status_code == 422 and "2147483647" in r.json()["message"]
    r = client.post(path + "/acknowledge", json={"by": "desk"}, headers=auth(keys["operate"]))
    assert r.status_code == 422 and "2147483647" in r.json()["message"]


def test_largest_alert_id_is_404(client, keys) -> None:
    """2**31 - 1 itself is a valid id that simply does not exist."""
    assert client.get("/v1/alerts/2147483647", headers=auth(keys["read"])).status_code == 404


def test_alerts_after_is_bounded_by_the_seq_column(client, keys) -> None:
    """`after` takes any seq up to 2**63 - 1 (BIGINT) and refuses more with a 422."""
    h = auth(keys["read"])
    r = client.get("/v1/alerts", params={"after": str(2**63 - 1)}, headers=h)
    assert r.status_code == 200 and r.json()["data"] == []
    r = client.get("/v1/alerts", params={"after": str(2**63)}, headers=h)
    assert r.status_code == 422 and "after" in r.json()["message"]


@pytest.mark.parametrize("name", ["detector_id", "group", "kind"])
@pytest.mark.parametrize("value", ["D\x001", "G\n", "x\x7f", "x\x85"])
def test_alerts_filters_with_control_characters_are_422(client, keys, name, value) -> None:
    """NUL and other control characters in a filter are refused with a 422 that says so."""
    r = client.get("/v1/alerts", params={name: value}, headers=auth(keys["read"]))
    assert r.status_code == 422, r.text
    assert name in r.json()["message"] and "control character" in r.json()["message"]


@pytest.mark.parametrize("ack", [{"by": "desk\x00"}, {"by": "desk\n2"},
                                 {"by": "desk", "note": "cone placed\x00"},
                                 {"by": "desk", "note": "bell\x07"}])
def test_acknowledge_refuses_control_characters(client, engine, keys, ack) -> None:
    """A NUL (or other control character) in who or the note is a 422, and nothing changes."""
    make_detector(engine, "D1")
    alert_id = write_alert(engine, "D1", BASE_T)
    r = client.post(f"/v1/alerts/{alert_id}/acknowledge", json=ack, headers=auth(keys["operate"]))
    assert r.status_code == 422 and "control character" in r.json()["message"]
    assert client.get(f"/v1/alerts/{alert_id}", headers=auth(keys["read"])
                      ).json()["acknowledged"] is None


def test_acknowledge_note_may_hold_line_breaks_and_tabs(client, engine, keys) -> None:
    """A note is prose: line breaks and tabs are kept as sent."""
    make_detector(engine, "D1")
    alert_id = write_alert(engine, "D1", BASE_T)
    note = "loop cut at the stop bar\r\n\tcrew booked"
    r = client.post(f"/v1/alerts/{alert_id}/acknowledge", json={"by": "desk 4", "note": note},
                    headers=auth(keys["operate"]))
    assert r.status_code == 200 and r.json()["acknowledged"]["note"] == note


def test_detector_health_with_a_malformed_id_is_422(client, keys) -> None:
    """The detector health route checks the id's form before touching the database."""
    r = client.get("/v1/detectors/D1%00x/health", headers=auth(keys["read"]))
    assert r.status_code == 422 and "detector_id" in r.json()["message"]



def test_alert_list_refuses_a_kind_by_its_former_name(client, keys) -> None:
    """The kinds were renamed (migration 0005): a former name gets a 422 listing today's kinds."""
    r = client.get("/v1/alerts", params={"kind": "no_" + "data"}, headers=auth(keys["read"]))
    assert r.status_code == 422
    assert "zero_counts" in r.json()["message"] and "no_reports" in r.json()["message"]
