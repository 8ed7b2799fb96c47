"""Detector service states through the API: who may set which, bad input, health, and the
automatic return to service at ``until``."""

from __future__ import annotations

import time

import pytest

from service.store import detectors as registry
from service.store.engine import write_transaction
from service.store.scoring import AlertWriter
from service.timefmt import format_utc
from tests.conftest import auth
from tests.factories import make_detector
from tests.web.test_alerts import BASE_T, alert_values


def patch(client, key: str, detector_id: str, **body):  # type: ignore[no-untyped-def]
    return client.patch(f"/v1/detectors/{detector_id}", json=body, headers=auth(key))


def test_new_detector_is_in_service(client, engine, keys) -> None:
    """A registered detector starts in service, as its record and its health say."""
    make_detector(engine, "D1")
    r = client.get("/v1/detectors/D1", headers=auth(keys["read"]))
    assert r.json()["service"]["state"] == "in_service"
    h = client.get("/v1/detectors/D1/health", headers=auth(keys["read"])).json()
    assert h["service"]["state"] == "in_service"


def test_operate_key_puts_detector_out_of_service_with_reason_and_until(client, engine,
                                                                       keys) -> None:
    """An operate key sets out_of_service with a reason and an until; by is the key's name,
    and the detector's health shows the state."""
    make_detector(engine, "D1")
    until = format_utc(time.time() + 3600)
    r = patch(client, keys["operate"], "D1", state="out_of_service",
              reason="loop cut by paving crew, WO 4471", until=until)
    assert r.status_code == 200, r.text
    service = r.json()["service"]
    assert service["state"] == "out_of_service" and service["by"] == "operate-key"
    assert service["reason"] == "loop cut by paving crew, WO 4471" and service["until"] == until
    h = client.get("/v1/detectors/D1/health", headers=auth(keys["read"])).json()
    assert h["service"] == service
    back = patch(client, keys["operate"], "D1", state="in_service")
    assert back.status_code == 200 and back.json()["service"]["state"] == "in_service"


def test_only_admin_retires_or_unretires(client, engine, keys) -> None:
    """Retiring, and changing a retired detector, are admin-only (403 for operate); read keys
    may not change states at all."""
    make_detector(engine, "D1")
    assert patch(client, keys["read"], "D1", state="out_of_service",
                 reason="x").status_code == 403
    r = patch(client, keys["operate"], "D1", state="retired", reason="station removed")
    assert r.status_code == 403 and "admin" in r.json()["message"]
    assert patch(client, keys["admin"], "D1", state="retired",
                 reason="station removed").status_code == 200
    r = patch(client, keys["operate"], "D1", state="in_service")
    assert r.status_code == 403
    r = patch(client, keys["admin"], "D1", state="in_service", reason="rebuilt")
    assert r.status_code == 200 and r.json()["service"]["state"] == "in_service"


@pytest.mark.parametrize(("body", "words"), [
    ({"state": "broken", "reason": "x"}, ["state", "out_of_service"]),
    ({"state": "out_of_service", "reason": "x", "until": "2020-01-01T00:00:00Z"},
     ["until", "not in the future"]),
    ({"state": "out_of_service", "reason": "x", "until": "tomorrow"}, ["until", "RFC 3339"]),
    ({"state": "in_service", "until": "2099-01-01T00:00:00Z"}, ["until", "out_of_service only"]),
    ({"state": "out_of_service"}, ["reason", "required"]),
    ({"state": "out_of_service", "reason": "x", "by": "me"}, ["by"]),
])
def test_bad_state_change_is_clear_422(client, engine, keys, body, words) -> None:
    """An unknown state, an until in the past (or unreadable, or with another state), a
    missing reason or an unknown field is a 422 saying what is wrong; nothing changes."""
    make_detector(engine, "D1")
    r = patch(client, keys["admin"], "D1", **body)
    assert r.status_code == 422, r.text
    message = r.json()["message"]
    for word in words:
        assert word in message, message
    state = client.get("/v1/detectors/D1", headers=auth(keys["read"])).json()["service"]
    assert state["state"] == "in_service"


def test_state_change_of_unknown_detector_is_404(client, keys) -> None:
    """Changing the state of a detector that is not registered is a 404."""
    r = patch(client, keys["admin"], "NOPE", state="out_of_service", reason="x")
    assert r.status_code == 404 and "NOPE" in r.json()["message"]


def test_detector_returns_to_service_by_itself_at_until(client, engine, keys) -> None:
    """Past its until the detector shows in service at once, and the sweep records it and
    raises its suppressed alerts that are still open (closed ones stay suppressed)."""
    make_detector(engine, "D1")
    until_s = time.time() + 600
    r = patch(client, keys["operate"], "D1", state="out_of_service", reason="crew on site",
              until=format_utc(until_s))
    assert r.status_code == 200
    with write_transaction(engine) as conn:
        writer = AlertWriter(conn, time.time())
        still_open = writer.upsert(None, alert_values("D1", BASE_T, suppressed=1))
        ended = writer.upsert(None, alert_values("D1", BASE_T - 7200, suppressed=1,
                                                 status="closed", closed_s=BASE_T - 6000))
    h = auth(keys["read"])
    assert client.get("/v1/alerts", headers=h).json()["data"] == []
    both = client.get("/v1/alerts", params={"suppressed": "true"}, headers=h).json()["data"]
    assert {a["id"] for a in both} == {still_open, ended} and all(a["suppressed"] for a in both)
    assert registry.return_due(engine, now=until_s - 1) == []
    assert registry.return_due(engine, now=until_s + 1) == ["D1"]
    shown = client.get("/v1/alerts", headers=h).json()["data"]
    assert [a["id"] for a in shown] == [still_open] and not shown[0]["suppressed"]
    service = client.get("/v1/detectors/D1", headers=h).json()["service"]
    assert service["state"] == "in_service" and service["until"] is None
    assert registry.return_due(engine, now=until_s + 2) == []
