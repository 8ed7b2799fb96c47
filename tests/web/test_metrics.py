"""GET /metrics: the Prometheus text format from prometheus-client, behind the API key rules
(or open by TALLYWARD_METRICS_PUBLIC), with per-app registries and database figures read at
scrape time."""

from __future__ import annotations

import httpx
from prometheus_client.parser import text_string_to_metric_families
from starlette.testclient import TestClient

from service.config import Settings
from service.web.app import create_app
from tests.conftest import LiveServer, auth
from tests.factories import count_items, make_detector
from tests.web.test_alerts import BASE_T, write_alert


def samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """Every sample of an exposition by (name, sorted labels); parsing fails on a malformed
    exposition."""
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for family in text_string_to_metric_families(text) for s in family.samples}


def scrape(client, key: str) -> dict:  # type: ignore[no-untyped-def]
    r = client.get("/metrics", headers=auth(key))
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].startswith("text/plain; version=0.0.4")
    return samples(r.text)


def test_metrics_without_a_key_is_401_when_keys_are_required(client, keys) -> None:
    """Keys required (the default): /metrics without a key is 401 with our error body; an
    ingest-only key is 403; a read key gets the figures."""
    r = client.get("/metrics")
    assert r.status_code == 401
    assert r.json()["error"] == "unauthorized" and "WWW-Authenticate" in r.headers
    assert client.get("/metrics", headers=auth(keys["ingest"])).status_code == 403
    assert client.get("/metrics", headers=auth(keys["read"])).status_code == 200


def test_metrics_public_setting_opens_metrics_only(database_url, engine) -> None:
    """TALLYWARD_METRICS_PUBLIC=true opens /metrics without a key; the API still needs one."""
    app = create_app(Settings(database_url=database_url, metrics_public=True), engine=engine)
    with TestClient(app) as c:
        assert c.get("/metrics").status_code == 200
        assert c.get("/v1/alerts").status_code == 401


def test_count_outcomes_and_rejections_by_reason(client, engine, keys) -> None:
    """Each posted item is counted once under its outcome; rejected items also by reason."""
    make_detector(engine, "D1")
    items = count_items("D1", n=5)
    ingest = auth(keys["ingest"])
    assert client.post("/v1/counts", json={"counts": items}, headers=ingest).status_code == 200
    again = [*items[:2], {**items[2], "count": items[2]["count"] + 1},
             {"detector_id": "NOPE", "start": items[0]["start"], "count": 1},
             {"detector_id": "D1", "start": items[0]["start"][:-4] + "1:00Z", "count": 1},
             {"detector_id": "D1", "start": items[0]["start"], "count": -3}]
    assert client.post("/v1/counts", json={"counts": again}, headers=ingest).status_code == 422
    got = scrape(client, keys["read"])
    total = "tallyward_counts_total"
    assert got[(total, (("outcome", "accepted"),))] == 5
    assert got[(total, (("outcome", "duplicate"),))] == 2
    assert got[(total, (("outcome", "conflict"),))] == 1
    assert got[(total, (("outcome", "rejected"),))] == 3
    rejected = "tallyward_counts_rejected_total"
    assert got[(rejected, (("reason", "unknown_detector"),))] == 1
    assert got[(rejected, (("reason", "bad_count"),))] == 1
    assert sum(v for (name, _), v in got.items() if name == rejected) == 3


def test_request_latency_is_filed_by_route_template(client, keys) -> None:
    """Requests are timed under their route template, not the raw path, so ids do not make
    new series; paths no route serves share one label."""
    read = auth(keys["read"])
    for alert_id in (7, 8, 9):
        assert client.get(f"/v1/alerts/{alert_id}", headers=read).status_code == 404
    client.get("/no/such/path/123", headers=read)
    got = scrape(client, keys["read"])
    count = "tallyward_http_request_duration_seconds_count"
    key = (count, (("method", "GET"), ("route", "/v1/alerts/{alert_id}"), ("status", "404")))
    assert got[key] == 3
    assert not any("/v1/alerts/7" in dict(labels).get("route", "") for _, labels in got)
    assert got[(count, (("method", "GET"), ("route", "<unmatched>"), ("status", "404")))] == 1


def test_database_figures_are_read_at_scrape_time(client, engine, keys) -> None:
    """Open alerts by kind and cause, detectors by state and the scoring backlog come from the
    database as it is when scraped (not from this process's history)."""
    for det in ("D1", "D2", "D3"):
        make_detector(engine, det)
    got = scrape(client, keys["read"])
    assert got[("tallyward_detectors", (("state", "in_service"),))] == 3
    assert got[("tallyward_open_alerts", (("cause", "detector"), ("kind", "zero_counts")))] == 0
    assert got[("tallyward_database_up", ())] == 1
    write_alert(engine, "D1", BASE_T)
    write_alert(engine, "D2", BASE_T, kind="high_volume", cause="traffic")
    write_alert(engine, "D3", BASE_T, status="closed", closed_s=BASE_T + 900)
    got = scrape(client, keys["read"])
    assert got[("tallyward_open_alerts", (("cause", "detector"), ("kind", "zero_counts")))] == 1
    assert got[("tallyward_open_alerts", (("cause", "traffic"), ("kind", "high_volume")))] == 1
    assert sum(v for (n, _), v in got.items() if n == "tallyward_open_alerts") == 2
    health = client.get("/v1/health").json()
    assert got[("tallyward_scoring_backlog_detectors", ())] == health["scoring"]["backlog"]


def test_two_apps_in_one_process_keep_their_own_figures(database_url, engine, keys) -> None:
    """Each app has its own registry: what one app counts never shows in another's."""
    make_detector(engine, "D1")
    settings = Settings(database_url=database_url)
    with TestClient(create_app(settings, engine=engine)) as a, \
            TestClient(create_app(settings, engine=engine)) as b:
        r = a.post("/v1/counts", json={"counts": count_items("D1", n=4)},
                   headers=auth(keys["ingest"]))
        assert r.status_code == 200
        assert scrape(a, keys["read"])[("tallyward_counts_total", (("outcome", "accepted"),))] == 4
        assert scrape(b, keys["read"])[("tallyward_counts_total", (("outcome", "accepted"),))] == 0


def test_metrics_over_real_http(database_url, keys) -> None:
    """A real server answers /metrics in the text format with a read key and 401 without."""
    server = LiveServer(database_url).start()
    try:
        assert httpx.get(server.url + "/metrics").status_code == 401
        r = httpx.get(server.url + "/metrics", headers=auth(keys["read"]))
        assert r.status_code == 200 and r.headers["content-type"].startswith("text/plain")
        got = samples(r.text)
        assert got[("tallyward_database_up", ())] == 1
        assert ("tallyward_build_info", (("auth", "required"), ("clock", "wall"),
                                         ("scoring", "inline"), ("version", "0.1.0"))) in got
    finally:
        server.stop()
