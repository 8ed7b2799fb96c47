"""An out-of-service detector's alerts are kept as suppressed; back in service, an alert that
still holds is raised. Retired detectors raise no missing-data alerts. Through the API, with
scoring run as the worker would."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient

from service.config import Settings
from service.pipeline import score
from service.web.app import create_app
from tests.conftest import auth
from tests.factories import small_network
from tests.pipeline.test_score import HOUR, period_rows, post, prepared

DETECTOR = "bra3-nb-t1"
PACER = "bra3-nb-lt"  # keeps reporting, so the data clock moves while DETECTOR is silent


@pytest.fixture(scope="module")
def network():  # type: ignore[no-untyped-def]
    return small_network((DETECTOR, PACER), history_days=21, test_days=2, seed=3)


@pytest.fixture
def setup(database_url, engine, keys, network):  # type: ignore[no-untyped-def]
    settings = Settings(database_url=database_url, clock="data", scoring="off")
    prepared(engine, settings, network)
    with TestClient(create_app(settings, engine=engine)) as client:
        yield client, settings


def dead_from(net, t: int):  # type: ignore[no-untyped-def]
    """DETECTOR counts zeros from ``t`` on (a dead loop); the other detector is normal."""
    def edit(r):  # type: ignore[no-untyped-def]
        return [r[0], r[1], 0] if r[0] == DETECTOR and r[1] >= t else r
    return period_rows(net, edit=edit)


def own_alerts(client, key: str, **params) -> list[dict]:  # type: ignore[type-arg]
    page = client.get("/v1/alerts", params={"detector_id": DETECTOR, **params},
                      headers=auth(key)).json()
    return page["data"]


def test_out_of_service_detector_that_goes_dead_raises_alert_only_back_in_service(
        setup, engine, keys, network) -> None:
    """Out of service, a detector going dead at the morning peak raises no alert (it is kept
    as suppressed, listed with suppressed=true); put back in service while still dead, the
    same alert is raised (a new seq) and stays raised."""
    client, settings = setup
    read, operate = keys["read"], keys["operate"]
    dead = network.test_start_s + 7 * HOUR
    rows = dead_from(network, dead)
    post(engine, [r for r in rows if r[1] < dead])
    score.score_until_idle(engine, settings)
    r = client.patch(f"/v1/detectors/{DETECTOR}", headers=auth(operate),
                     json={"state": "out_of_service", "reason": "loop replacement, WO 2211"})
    assert r.status_code == 200, r.text
    post(engine, [r for r in rows if dead <= r[1] < dead + HOUR])
    score.score_until_idle(engine, settings)
    assert own_alerts(client, read) == []
    kept = [a for a in own_alerts(client, read, suppressed="true") if a["kind"] == "zero_counts"]
    assert len(kept) == 1 and kept[0]["suppressed"] and kept[0]["status"] == "open"
    health = client.get(f"/v1/detectors/{DETECTOR}/health", headers=auth(read)).json()
    assert health["service"]["state"] == "out_of_service"
    assert [(a["id"], a["suppressed"]) for a in health["open_alerts"]] == [(kept[0]["id"], True)]

    r = client.patch(f"/v1/detectors/{DETECTOR}", headers=auth(operate),
                     json={"state": "in_service", "reason": "crew left; still reads zero"})
    assert r.status_code == 200
    raised = own_alerts(client, read)
    assert [(a["id"], a["kind"], a["suppressed"]) for a in raised] == \
        [(kept[0]["id"], "zero_counts", False)]
    assert raised[0]["seq"] > kept[0]["seq"]
    post(engine, [r for r in rows if dead + HOUR <= r[1] < dead + 2 * HOUR])
    score.score_until_idle(engine, settings)
    later = own_alerts(client, read, status="open")
    assert [(a["id"], a["suppressed"]) for a in later] == [(kept[0]["id"], False)]


@pytest.mark.slow
def test_alert_that_ended_while_out_of_service_stays_suppressed(setup, engine, keys,
                                                                network) -> None:
    """A fault that came and went while the detector was out of service is not raised when it
    returns to service: the alert is closed and stays suppressed."""
    client, settings = setup
    dead = network.test_start_s + 7 * HOUR
    alive = dead + HOUR

    def edit(r):  # type: ignore[no-untyped-def]
        return [r[0], r[1], 0] if r[0] == DETECTOR and dead <= r[1] < alive else r

    rows = period_rows(network, edit=edit)
    post(engine, [r for r in rows if r[1] < dead])
    score.score_until_idle(engine, settings)
    client.patch(f"/v1/detectors/{DETECTOR}", headers=auth(keys["operate"]),
                 json={"state": "out_of_service", "reason": "cabinet rewiring"})
    post(engine, [r for r in rows if dead <= r[1] < alive + 2 * HOUR])
    score.score_until_idle(engine, settings)
    client.patch(f"/v1/detectors/{DETECTOR}", headers=auth(keys["operate"]),
                 json={"state": "in_service"})
    assert own_alerts(client, keys["read"]) == []
    kept = own_alerts(client, keys["read"], suppressed="true")
    assert kept and all(a["suppressed"] and a["status"] == "closed" for a in kept)


@pytest.mark.slow
def test_retired_detector_raises_no_missing_data_alert(setup, engine, keys, network) -> None:
    """A retired detector that stops reporting raises no no_reports alert; the same silence
    on a detector in service does."""
    client, settings = setup
    quiet = network.test_start_s + 9 * HOUR
    rows = period_rows(network)
    post(engine, [r for r in rows if r[1] < quiet])
    score.score_until_idle(engine, settings)
    r = client.patch(f"/v1/detectors/{DETECTOR}", headers=auth(keys["admin"]),
                     json={"state": "retired", "reason": "station removed for widening"})
    assert r.status_code == 200, r.text
    post(engine, [r for r in rows if quiet <= r[1] < quiet + 3 * HOUR and r[0] == PACER])
    score.score_until_idle(engine, settings)
    for suppressed in ("false", "true"):
        assert not [a for a in own_alerts(client, keys["read"], suppressed=suppressed)
                    if a["kind"] == "no_reports"]
    client.patch(f"/v1/detectors/{DETECTOR}", headers=auth(keys["admin"]),
                 json={"state": "in_service", "reason": "rebuilt"})
    post(engine, [r for r in rows if quiet + 3 * HOUR <= r[1] < quiet + 5 * HOUR
                  and r[0] == PACER])
    score.score_until_idle(engine, settings)
    assert [a for a in own_alerts(client, keys["read"]) if a["kind"] == "no_reports"]
