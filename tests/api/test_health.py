"""GET /v1/health and the OpenAPI docs."""

from __future__ import annotations

from tests.conftest import auth
from tests.factories import count_items, make_detector


def test_health_reports_database_migration_and_counts(client, engine, keys) -> None:
    """Health says the database answers, the schema is at head, and what is stored."""
    make_detector(engine, "D1")
    client.post("/v1/counts", json={"counts": count_items("D1", n=5)}, headers=auth(keys["ingest"]))
    body = client.get("/v1/health").json()
    assert body["status"] == "ok"
    assert body["migration"]["current"] == body["migration"]["head"]
    assert body["counts_stored"] == 5 and body["detectors"] == 1
    assert body["latest_interval"] == count_items("D1", n=5)[-1]["start"]


def test_openapi_docs_are_served(client) -> None:
    """Interactive docs at /docs and the OpenAPI document list the count route."""
    assert client.get("/docs").status_code == 200
    assert "/v1/counts" in client.get("/openapi.json").json()["paths"]


def test_unknown_route_is_json_404(client) -> None:
    """Unknown paths answer JSON, not HTML."""
    r = client.get("/v1/nothing")
    assert r.status_code == 404 and r.json()["error"] == "not_found"
