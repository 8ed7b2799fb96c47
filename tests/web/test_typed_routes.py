"""Typed routes: every operation documents a non-empty 2xx body schema, real 2xx bodies fit it,
and every request body parsed by a model refuses unknown fields naming them."""

from __future__ import annotations

from typing import Any

import pytest

from tests.conftest import auth
from tests.factories import detector_payload, make_detector
from tests.web.test_alerts import BASE_T, write_alert
from tests.web.test_openapi import operations, spec, validator  # noqa: F401 - spec is a fixture


def test_every_operation_documents_a_non_empty_2xx_schema(spec) -> None:  # noqa: F811
    """Each operation has a 2xx response whose JSON schema is a published, non-empty model."""
    components = spec["components"]["schemas"]
    for method, path, op in operations(spec):
        found = [r["content"]["application/json"]["schema"] for code, r in op["responses"].items()
                 if code.startswith("2") and "application/json" in r.get("content", {})]
        assert found, (method, path)
        for schema in found:
            assert schema, (method, path)
            name = schema["$ref"].rsplit("/", 1)[-1]
            assert components[name].get("properties"), (method, path, name)


def _fits(spec: dict[str, Any], method: str, path: str, body: Any) -> None:  # noqa: F811
    schema = spec["paths"][path][method]["responses"]["200"]["content"]["application/json"]
    errors = [e.message for e in validator(spec, schema["schema"]).iter_errors(body)]
    assert not errors, (method, path, errors)


def test_real_alert_count_and_health_bodies_fit_their_published_schemas(
        spec, client, engine, keys) -> None:  # noqa: F811
    """Alert list, one alert, an acknowledgement, detector health, counts and conflicts."""
    make_detector(engine, "D1")
    alert_id = write_alert(engine, "D1", BASE_T)
    read, operate = auth(keys["read"]), auth(keys["operate"])
    cases = [
        ("get", "/v1/alerts", client.get("/v1/alerts", headers=read)),
        ("get", "/v1/alerts/{alert_id}", client.get(f"/v1/alerts/{alert_id}", headers=read)),
        ("post", "/v1/alerts/{alert_id}/acknowledge", client.post(
            f"/v1/alerts/{alert_id}/acknowledge", json={"by": "desk 2", "note": "crew out"},
            headers=operate)),
        ("get", "/v1/detectors/{detector_id}/health",
         client.get("/v1/detectors/D1/health", headers=read)),
        ("get", "/v1/counts", client.get("/v1/counts", params={"detector_id": "D1"},
                                         headers=read)),
        ("get", "/v1/counts/conflicts", client.get("/v1/counts/conflicts", headers=read)),
    ]
    for method, path, r in cases:
        assert r.status_code == 200, (path, r.text)
        _fits(spec, method, path, r.json())
    assert cases[2][2].json()["acknowledged"]["by"] == "desk 2"


@pytest.mark.parametrize("method, path, body, role, field", [
    ("post", "/v1/baselines/fit", {"detectors": ["D1"]}, "admin", "detectors"),
    ("post", "/v1/baselines/fit", {"detector_ids": ["D1"], "asof": "2026-11-17T00:00:00Z"},
     "admin", "asof"),
    ("post", "/v1/alerts/1/acknowledge", {"by": "desk 2", "comment": "x"}, "operate", "comment"),
    ("put", "/v1/detectors/D2", detector_payload(interval=300), "admin", "interval"),
    ("put", "/v1/detectors/D2", detector_payload(location={
        "type": "Point", "coordinates": [-97.5, 35.2], "crs": "x"}), "admin", "location.crs"),
])
def test_request_bodies_refuse_unknown_fields_naming_them(
        client, engine, keys, method, path, body, role, field) -> None:
    """A typo in a body field is a 422 naming the field, and nothing happens."""
    make_detector(engine, "D1")
    write_alert(engine, "D1", BASE_T)
    r = client.request(method.upper(), path, json=body, headers=auth(keys[role]))
    assert r.status_code == 422, r.text
    problems = r.json()["detail"]
    assert [p["field"] for p in problems] == [field]
    assert "Extra inputs are not permitted" in problems[0]["message"]
    assert field in r.json()["message"]
    assert client.get("/v1/detectors/D2", headers=auth(keys["read"])).status_code == 404
    assert client.get("/v1/alerts/1", headers=auth(keys["read"])).json()["acknowledged"] is None


def test_fit_with_a_mistyped_field_refits_nothing(client, engine, keys) -> None:
    """{"detectors": [...]} for detector_ids is refused instead of refitting every detector."""
    make_detector(engine, "D1")
    r = client.post("/v1/baselines/fit", json={"detectors": ["D1"]}, headers=auth(keys["admin"]))
    assert r.status_code == 422
    with engine.connect() as conn:
        assert conn.exec_driver_sql("SELECT count(*) FROM baselines").scalar() == 0


def test_detector_import_refuses_unknown_properties_per_feature(client, keys) -> None:
    """A feature property that is no detector field is listed for that feature by name."""
    features = [{"type": "Feature", "id": "A1", "geometry": None,
                 "properties": {"interval_s": 300, "timezone": "UTC", "lane": 2}},
                {"type": "Feature", "id": "A2", "geometry": None,
                 "properties": {"interval_s": 300, "timezone": "UTC"}}]
    r = client.post("/v1/detectors:import", json={"type": "FeatureCollection",
                                                   "features": features},
                    headers=auth(keys["admin"]))
    assert r.status_code == 422
    assert [e["index"] for e in r.json()["errors"]] == [0]
    assert "lane" in r.json()["errors"][0]["error"]
