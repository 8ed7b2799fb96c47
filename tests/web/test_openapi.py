"""The published OpenAPI contract: every error response documented with our Error body, the
hand-parsed request bodies declared, the bearer-key scheme applied, and real responses that
validate against what is published."""

from __future__ import annotations

import re
from typing import Any

import httpx
import pytest
from jsonschema import Draft202012Validator

from service.web.openapi import EXTRA, SCHEME, Error
from tests.conftest import auth
from tests.factories import count_items, make_detector

ERROR_REF = "#/components/schemas/Error"


@pytest.fixture(scope="module")
def spec() -> dict[str, Any]:
    """The document as served at /openapi.json (built once; it does not depend on the data)."""
    from starlette.testclient import TestClient

    from service.config import Settings
    from service.web.app import create_app

    app = create_app(Settings(database_url="sqlite://"))
    with TestClient(app) as client:
        r = client.get("/openapi.json")
    assert r.status_code == 200
    return r.json()


def operations(spec: dict[str, Any]) -> list[tuple[str, str, dict[str, Any]]]:
    return [(method.upper(), path, op) for path, ops in spec["paths"].items()
            for method, op in ops.items()]


def schema_of(op: dict[str, Any], status: int | str) -> dict[str, Any]:
    return op["responses"][str(status)]["content"]["application/json"]["schema"]


def refs_error(schema: dict[str, Any]) -> bool:
    """The schema is our Error, or a choice that includes it."""
    return schema.get("$ref") == ERROR_REF or any(
        s.get("$ref") == ERROR_REF for s in schema.get("anyOf", []) + schema.get("oneOf", []))


def takes_input(op: dict[str, Any]) -> bool:
    return bool(op.get("parameters")) or "requestBody" in op


def validator(spec: dict[str, Any], schema: dict[str, Any]) -> Draft202012Validator:
    """A validator for one published schema, with the document's components to resolve refs."""
    return Draft202012Validator({**schema, "components": spec["components"]})


def assert_documented(spec: dict[str, Any], method: str, path: str, r: httpx.Response) -> None:
    """The response's status is documented for the operation and its body fits the schema."""
    op = spec["paths"][path][method.lower()]
    assert str(r.status_code) in op["responses"], (method, path, r.status_code, r.text)
    schema = schema_of(op, r.status_code)
    errors = sorted(validator(spec, schema).iter_errors(r.json()), key=str)
    assert not errors, f"{method} {path} {r.status_code}: {[e.message for e in errors]}"


# ---------------------------------------------------------------------------- the document


def test_every_keyed_operation_documents_401_and_403_with_the_error_schema(spec) -> None:
    """Each operation that needs a key documents 401 and 403 with the Error body."""
    keyed = [(m, p, op) for m, p, op in operations(spec) if op.get("security")]
    assert len(keyed) == len(operations(spec)) - 1  # all but GET /v1/health
    for method, path, op in keyed:
        for status in (401, 403):
            assert schema_of(op, status) == {"$ref": ERROR_REF}, (method, path, status)


def test_every_operation_that_takes_input_documents_422_with_our_error_schema(spec) -> None:
    """422 is documented wherever there are parameters or a body, and it is our Error shape."""
    with_input = [(m, p, op) for m, p, op in operations(spec) if takes_input(op)]
    assert len(with_input) >= 13
    for method, path, op in with_input:
        assert refs_error(schema_of(op, 422)), (method, path)


def test_fastapi_default_validation_schemas_are_not_published(spec) -> None:
    """Neither HTTPValidationError nor ValidationError appears anywhere in the document."""
    assert "HTTPValidationError" not in spec["components"]["schemas"]
    assert "ValidationError" not in spec["components"]["schemas"]
    assert "HTTPValidationError" not in str(spec["paths"])


def test_published_error_schema_is_the_error_model(spec) -> None:
    """The Error component requires error and message and allows the 422 field list."""
    published = spec["components"]["schemas"]["Error"]
    assert published["required"] == ["error", "message"]
    detail = published["properties"]["detail"]["anyOf"]
    assert {"items": {"$ref": "#/components/schemas/FieldProblem"}, "type": "array"} in detail
    assert spec["components"]["schemas"]["FieldProblem"]["required"] == ["field", "message"]


def test_every_error_status_documented_uses_the_error_schema(spec) -> None:
    """Every documented 4xx/503 has a body schema: Error (or the count batch result)."""
    for method, path, op in operations(spec):
        for status, response in op["responses"].items():
            if status.startswith("4") or status == "503":
                schema = response["content"]["application/json"]["schema"]
                ours = refs_error(schema) or schema.get("$ref", "").endswith(
                    ("/CountBatchResult", "/HealthReport"))
                assert ours, (method, path, status, schema)


def test_every_operation_documents_400_and_503_and_503_carries_retry_after(spec) -> None:
    """400 and 503 are documented everywhere; the Error 503 documents a Retry-After header."""
    for method, path, op in operations(spec):
        assert "400" in op["responses"] and "503" in op["responses"], (method, path)
        if refs_error(schema_of(op, 503)):
            assert op["responses"]["503"]["headers"]["Retry-After"]["required"] is True


def test_lookups_that_can_miss_document_404(spec) -> None:
    """Operations that look up a path id, or a detector named in a filter, document 404."""
    for method, path, op in operations(spec):
        if "{" in path and (method, path) != ("PUT", "/v1/detectors/{detector_id}"):
            assert schema_of(op, 404) == {"$ref": ERROR_REF}, (method, path)
    for method, path in (("get", "/v1/counts"), ("get", "/v1/alerts"),
                         ("post", "/v1/baselines/fit")):
        assert schema_of(spec["paths"][path][method], 404) == {"$ref": ERROR_REF}


def test_status_codes_particular_to_some_operations_are_documented(spec) -> None:
    """201 on PUT detector, 409/413/415 on POST counts, 304 with ETag on the alert poll."""
    put = spec["paths"]["/v1/detectors/{detector_id}"]["put"]["responses"]
    assert schema_of({"responses": put}, 201) == {"$ref": "#/components/schemas/DetectorPublic"}
    post = spec["paths"]["/v1/counts"]["post"]["responses"]
    assert {"200", "409", "413", "415", "422"} <= set(post)
    assert schema_of({"responses": post}, 409) == {"$ref": "#/components/schemas/CountBatchResult"}
    poll = spec["paths"]["/v1/alerts"]["get"]["responses"]
    assert "ETag" in poll["304"]["headers"] and "ETag" in poll["200"]["headers"]


def test_every_operation_named_in_extra_exists(spec) -> None:
    """The per-operation table names no operation that is gone or renamed."""
    published = {(m, p) for m, p, _ in operations(spec)}
    assert set(EXTRA) <= published, set(EXTRA) - published


def test_post_counts_declares_json_and_csv_bodies(spec) -> None:
    """POST /v1/counts declares both an application/json and a text/csv request body."""
    body = spec["paths"]["/v1/counts"]["post"]["requestBody"]
    assert body["required"] is True
    assert set(body["content"]) == {"application/json", "text/csv"}
    json_schema = body["content"]["application/json"]["schema"]
    item = json_schema["anyOf"][0]["properties"]["counts"]["items"]
    assert item["required"] == ["detector_id", "start", "count"]
    assert body["content"]["text/csv"]["example"].startswith("detector_id,start,count\n")


def test_post_counts_examples_fit_their_declared_schemas(spec) -> None:
    """The JSON example validates against the JSON body schema."""
    content = spec["paths"]["/v1/counts"]["post"]["requestBody"]["content"]["application/json"]
    assert not list(validator(spec, content["schema"]).iter_errors(content["example"]))


def test_detector_import_declares_a_feature_collection_body(spec) -> None:
    """POST /v1/detectors:import declares a GeoJSON FeatureCollection body."""
    body = spec["paths"]["/v1/detectors:import"]["post"]["requestBody"]
    schema = body["content"]["application/json"]["schema"]
    assert schema["required"] == ["type", "features"]
    assert schema["properties"]["type"]["enum"] == ["FeatureCollection"]
    example = body["content"]["application/json"]["example"]
    assert not list(validator(spec, schema).iter_errors(example))


def test_bearer_scheme_is_declared_and_applied_to_every_keyed_operation(spec) -> None:
    """An HTTP bearer scheme exists; every operation but health requires it."""
    scheme = spec["components"]["securitySchemes"][SCHEME]
    assert scheme["type"] == "http" and scheme["scheme"] == "bearer"
    for method, path, op in operations(spec):
        if (method, path) == ("GET", "/v1/health"):
            assert "security" not in op and "401" not in op["responses"]
        else:
            assert op["security"] == [{SCHEME: []}], (method, path)


def test_every_ref_resolves(spec) -> None:
    """No response or body refers to a component that is not published."""
    names = set(spec["components"]["schemas"])
    for name in re.findall(r"#/components/schemas/([A-Za-z0-9_]+)", str(spec)):
        assert name in names, name


# ---------------------------------------------------------------------------- real responses


def test_real_422_from_request_validation_validates_against_published_schema(
        spec, live_server, keys) -> None:
    """A parameter out of range is answered with a body that fits the published 422 schema."""
    r = httpx.get(live_server.url + "/v1/detectors", params={"limit": 0},
                  headers=auth(keys["read"]), timeout=30)
    assert r.status_code == 422
    assert_documented(spec, "GET", "/v1/detectors", r)
    body = Error.model_validate(r.json())
    assert body.error == "validation_failed"
    assert isinstance(body.detail, list) and body.detail[0].field == "query.limit"


def test_real_error_responses_of_each_kind_validate_against_published_schema(
        spec, live_server, keys, engine) -> None:
    """400, 401, 403, 404, 409, 413, 415 and 422 bodies from a real server fit their schemas."""
    make_detector(engine, "D1")
    url = live_server.url
    with httpx.Client(base_url=url, timeout=30) as c:
        admin, read = auth(keys["admin"]), auth(keys["read"])
        cases = [
            ("GET", "/v1/detectors", c.get("/v1/detectors")),  # 401
            ("GET", "/v1/detectors", c.get("/v1/detectors", headers=auth(keys["ingest"]))),  # 403
            ("GET", "/v1/detectors/{detector_id}", c.get("/v1/detectors/NOPE", headers=read)),
            ("GET", "/v1/detectors/{detector_id}/baseline",
             c.get("/v1/detectors/D1/baseline", params={"day_type": "weekday"}, headers=read)),
            ("GET", "/v1/detectors/{detector_id}/baseline",
             c.get("/v1/detectors/D1/baseline", headers=read)),  # 422 from the route
            ("POST", "/v1/counts", c.post("/v1/counts", content=b"{", headers={
                **admin, "Content-Type": "application/json"})),  # 400
            ("POST", "/v1/counts", c.post("/v1/counts", content=b"x", headers={
                **admin, "Content-Type": "text/plain"})),  # 415
            ("POST", "/v1/counts", c.post("/v1/counts", json={"counts": []}, headers=admin)),
            ("POST", "/v1/counts", c.post("/v1/counts", json={"counts": count_items("D1", n=2)},
                                          headers=admin)),  # 200
            ("POST", "/v1/counts", c.post("/v1/counts", json={"counts": [
                {**count_items("D1", n=1)[0], "count": 99}]}, headers=admin)),  # 409
            ("POST", "/v1/counts", c.post("/v1/counts", json={"counts": [
                {"detector_id": "D1", "start": "yesterday", "count": 1}]}, headers=admin)),
            ("POST", "/v1/counts", c.post("/v1/counts", json={"counts": [
                {"detector_id": "D1", "start": "x", "count": 1}] * 10_001}, headers=admin)),  # 413
            ("POST", "/v1/detectors:import", c.post("/v1/detectors:import", json=[],
                                                     headers=admin)),  # 400
            ("PUT", "/v1/detectors/{detector_id}", c.put("/v1/detectors/D9", json={
                "interval_s": 300, "timezone": "America/Chicago"}, headers=admin)),  # 201
        ]
    seen = set()
    for method, path, r in cases:
        assert_documented(spec, method, path, r)
        seen.add(r.status_code)
    assert seen == {200, 201, 400, 401, 403, 404, 409, 413, 415, 422}


def test_405_allow_lists_every_method_of_the_path(live_server, keys) -> None:
    """A path served by several routes answers 405 with all of their methods in Allow."""
    r = httpx.delete(live_server.url + "/v1/detectors/D1", headers=auth(keys["admin"]), timeout=30)
    assert r.status_code == 405
    assert r.headers["allow"] == "GET, PATCH, PUT"
    assert r.json()["error"] == "method_not_allowed"
    assert r.json()["message"] == ("method not allowed: DELETE /v1/detectors/D1 (this path "
                                   "takes GET, PUT); the routes and their methods are listed "
                                   "at /docs")
