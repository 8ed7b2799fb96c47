"""The published contract: the error body every error response really has, the status codes
each operation really answers, the request bodies parsed by hand, and the bearer-key scheme.

``document(app)`` runs in the app factory. It wraps ``app.openapi`` so that the schema
FastAPI generates is completed once, on first use: every operation gets the codes that
follow from what it depends on (always 400 and 503; a key: 401 and 403; a body: 413;
parameters or a body: 422 with our ``Error`` body in place of FastAPI's
``HTTPValidationError``, which is not published) plus those listed for it in ``EXTRA``; the
models and the bearer-key scheme are published under ``components``.
"""

from __future__ import annotations

import copy
import typing
from collections.abc import Callable
from typing import Any

import fastapi.routing
from fastapi import FastAPI, Request
from fastapi.routing import APIRoute
from pydantic import BaseModel, Field
from starlette.exceptions import HTTPException as StarletteHTTPException

from service.domain import DETECTOR_ID_PATTERN
from service.pipeline.ingest import CSV_HEADER, MAX_COUNT
from service.web import deps

REF = "#/components/schemas/"
SCHEME = "bearerKey"


# ---------------------------------------------------------------------------- bodies


class FieldProblem(BaseModel):
    """One reason a request was refused: where, and what is accepted there."""

    field: str = Field(description="Dotted location, e.g. `query.limit` or `interval_s`; "
                                   "empty when the problem is the whole body.")
    message: str


class Error(BaseModel):
    """The body of every error response (4xx and 503)."""

    error: str = Field(description="Stable machine-readable code, e.g. `validation_failed`, "
                                   "`unauthorized`, `forbidden`, `not_found`, `no_baseline`, "
                                   "`interval_locked`, `bad_request`, `payload_too_large`, "
                                   "`unsupported_media_type`, `unavailable`.")
    message: str = Field(description="What was wrong and what is accepted, for people.")
    detail: list[FieldProblem] | dict[str, Any] | None = Field(
        None, description="422 from request validation: one entry per problem. 413: the limit "
                          "that was passed (`max_body_bytes` or `max_items`). Absent otherwise.")


class CountRejection(BaseModel):
    """An item that can never be stored as sent: fix it and send only the fixed items."""

    index: int = Field(description="Position of the item in the batch (0-based; CSV: data rows).")
    detector_id: str | None
    start: str | None
    error: str
    reason: str = Field(description="Stable code of the problem: `bad_item`, `unknown_field`, "
                                    "`bad_csv_line`, `bad_detector_id`, `unknown_detector`, "
                                    "`bad_start`, `bad_count`, `future_start`, `off_grid`.")


class CountConflict(BaseModel):
    """An item whose interval already holds a different count: the stored one was kept."""

    index: int
    detector_id: str
    start: str
    stored: int
    offered: int
    resolution: str


class CountBatchResult(BaseModel):
    """The outcome of one batch: every item is stored, a duplicate, a conflict or rejected."""

    message: str
    accepted: int = Field(description="Items stored now.")
    duplicate: int = Field(description="Items already stored with the same count (success).")
    conflict: int = Field(description="Items whose interval holds a different stored count.")
    rejected: int = Field(description="Items that can never be stored as sent.")
    conflicts: list[CountConflict]
    errors: list[CountRejection]


class HealthReport(BaseModel):
    """Service health; `status` is `ok`, `migration_pending` or `unavailable`."""

    status: str


MODELS: tuple[type[BaseModel], ...] = (Error, CountBatchResult, HealthReport)


# ---------------------------------------------------------------------------- request bodies

_COUNT_ITEM = {
    "type": "object",
    "required": ["detector_id", "start", "count"],
    "properties": {
        "detector_id": {"type": "string", "pattern": DETECTOR_ID_PATTERN,
                        "description": "A registered detector."},
        "start": {"type": "string", "format": "date-time",
                  "description": "RFC 3339 interval start with a UTC offset, whole seconds, on "
                                 "the detector's local interval grid."},
        "count": {"type": "integer", "minimum": 0, "maximum": MAX_COUNT,
                  "description": "Vehicles counted in the interval."},
    },
}
_COUNT_EXAMPLE = {"detector_id": "D1", "start": "2026-11-16T08:15:00-06:00", "count": 42}

COUNTS_BODY: dict[str, Any] = {"requestBody": {
    "required": True,
    "description": "A batch of interval counts: JSON (an object with a `counts` list, or the "
                   f"list itself) or CSV with the header `{','.join(CSV_HEADER)}`.",
    "content": {
        "application/json": {
            "schema": {"anyOf": [
                {"type": "object", "required": ["counts"],
                 "properties": {"counts": {"type": "array", "minItems": 1, "items": _COUNT_ITEM}}},
                {"type": "array", "minItems": 1, "items": _COUNT_ITEM},
            ]},
            "example": {"counts": [_COUNT_EXAMPLE]},
        },
        "text/csv": {
            "schema": {"type": "string",
                       "description": f"UTF-8 (a BOM is allowed), header line "
                                      f"`{','.join(CSV_HEADER)}`, then one item per line."},
            "example": f"{','.join(CSV_HEADER)}\nD1,2026-11-16T08:15:00-06:00,42\n",
        },
    },
}}

_FEATURE = {
    "description": "A GeoJSON Feature (RFC 7946): `id` or `properties.detector_id` names the "
                   "detector, the other properties are the fields of PUT /v1/detectors/{id}, and "
                   "a Point geometry is its location. A feature that is not a valid detector is "
                   "listed in `errors` with its index (answered 200); the valid ones are stored.",
    "examples": [{"type": "Feature", "id": "D1",
                  "geometry": {"type": "Point", "coordinates": [-97.51, 35.21]},
                  "properties": {"interval_s": 300, "timezone": "America/Chicago", "lanes": 2}}],
}

IMPORT_BODY: dict[str, Any] = {"requestBody": {
    "required": True,
    "description": "A GeoJSON FeatureCollection (RFC 7946) of detectors.",
    "content": {"application/json": {
        "schema": {"type": "object", "required": ["type", "features"], "properties": {
            "type": {"type": "string", "enum": ["FeatureCollection"]},
            "features": {"type": "array", "items": _FEATURE}}},
        "example": {"type": "FeatureCollection", "features": [{
            "type": "Feature", "id": "D1",
            "geometry": {"type": "Point", "coordinates": [-97.51, 35.21]},
            "properties": {"interval_s": 300, "timezone": "America/Chicago", "lanes": 2}}]},
    }},
}}


# ---------------------------------------------------------------------------- responses


def _content(schema: dict[str, Any]) -> dict[str, Any]:
    return {"application/json": {"schema": schema}}


def error(description: str, **extra: Any) -> dict[str, Any]:
    """A documented response whose body is the ``Error`` model."""
    return {"description": description, "content": _content({"$ref": REF + "Error"}), **extra}


RETRY_AFTER = {"Retry-After": {"description": "Seconds to wait before retrying.", "required": True,
                               "schema": {"type": "string", "pattern": "^[0-9]+$"}}}
ETAG = {"ETag": {"description": "Send it back as If-None-Match to get 304 when nothing changed.",
                 "required": True, "schema": {"type": "string"}}}

BAD_REQUEST = error("Malformed request: a body that is not JSON (or CSV) of the documented shape, "
                    "or a Content-Length that is not a number.")
TOO_LARGE = error("The body is over the configured byte limit (`detail.max_body_bytes`), or a "
                  "batch has more items than allowed (`detail.max_items`).")
INVALID = error("Well-formed but unacceptable values; `detail` lists each problem when the "
                "parameters or body failed validation.")
UNAVAILABLE = error("The database is busy or unreachable; nothing was changed. Retry after "
                    "`Retry-After` seconds.", headers=RETRY_AFTER)


def _not_found(what: str) -> dict[str, Any]:
    return error(f"Not found: {what}.")


# Codes that depend on what one operation does, beyond those derived from its dependencies.
EXTRA: dict[tuple[str, str], dict[int | str, dict[str, Any]]] = {
    ("POST", "/v1/counts"): {
        200: {"description": "Every item stored, or an identical duplicate of a stored one.",
              "content": _content({"$ref": REF + "CountBatchResult"})},
        409: {"description": "Nothing rejected, but some offered counts differ from stored ones: "
                             "the stored ones were kept and the offered ones recorded "
                             "(`conflicts`; GET /v1/counts/conflicts).",
              "content": _content({"$ref": REF + "CountBatchResult"})},
        415: error("The Content-Type is neither application/json nor text/csv."),
        422: {"description": "Some items can never be stored as sent (listed in `errors`): all "
                             "valid items were stored; fix the rejected ones and send only "
                             "those. Or the batch is empty.",
              "content": _content({"anyOf": [{"$ref": REF + "CountBatchResult"},
                                             {"$ref": REF + "Error"}]})},
        503: error("The database is busy or unreachable; nothing was stored: resend the same "
                   "batch after `Retry-After` seconds.", headers=RETRY_AFTER),
    },
    ("GET", "/v1/counts"): {404: _not_found("unknown detector")},
    ("POST", "/v1/detectors:import"): {
        400: error("The body is not JSON, or not a GeoJSON FeatureCollection."),
        415: error("The body is compressed (gzip is not accepted)."),
        422: {"description": "Some features were refused (listed in `errors` with their index; "
                             "the valid ones were stored).",
              "content": _content({"anyOf": [{"$ref": REF + "DetectorImportResult"},
                                             {"$ref": REF + "Error"}]})},
    },
    ("PUT", "/v1/detectors/{detector_id}"): {
        201: {"description": "The detector was created.",
              "content": _content({"$ref": REF + "DetectorPublic"})},
        422: error("Invalid fields, or `interval_locked`: the interval of a detector with "
                   "stored counts cannot change."),
    },
    ("GET", "/v1/detectors/{detector_id}"): {404: _not_found("unknown detector")},
    ("GET", "/v1/detectors/{detector_id}/service-periods"): {404: _not_found("unknown detector")},
    ("POST", "/v1/baselines/fit"): {404: _not_found("an unknown detector in `detector_ids`")},
    ("GET", "/v1/jobs/{job_id}"): {404: _not_found("unknown job id")},
    ("GET", "/v1/detectors/{detector_id}/baseline"): {
        404: _not_found("unknown detector, or `no_baseline` when none is fitted yet")},
    ("GET", "/v1/detectors/{detector_id}/baseline/profile"): {
        404: _not_found("unknown detector, or `no_baseline` when none is fitted yet")},
    ("GET", "/v1/alerts"): {
        200: {"description": "Alert changes after `after`.", "headers": ETAG},
        304: {"description": "Nothing changed since the ETag sent as If-None-Match.",
              "headers": ETAG},
        404: _not_found("unknown `detector_id`"),
    },
    ("GET", "/v1/alerts/{alert_id}"): {404: _not_found("unknown alert")},
    ("POST", "/v1/alerts/{alert_id}/acknowledge"): {404: _not_found("unknown alert")},
    ("GET", "/v1/detectors/{detector_id}/health"): {404: _not_found("unknown detector")},
    # Service states, alert history, count corrections (migration 0007).
    ("PATCH", "/v1/detectors/{detector_id}"): {404: _not_found("unknown detector")},
    ("POST", "/v1/alerts/{alert_id}/unacknowledge"): {404: _not_found("unknown alert")},
    ("POST", "/v1/alerts/{alert_id}/notes"): {404: _not_found("unknown alert")},
    ("POST", "/v1/counts/corrections"): {
        404: _not_found("unknown detector or conflict, or no count stored at that interval")},
    ("GET", "/v1/counts/corrections"): {404: _not_found("unknown `detector_id`")},
    # planners' figures (service/web/routes/figures.py)
    ("GET", "/v1/detectors/{detector_id}/volumes"): {
        404: _not_found("unknown detector, or `no_baseline` when none is fitted yet")},
    ("GET", "/v1/groups/{group_id}/volumes"): {
        404: _not_found("`empty_group`: no detector has this group, or `no_baseline`")},
    ("GET", "/v1/detectors/{detector_id}/figures"): {
        404: _not_found("unknown detector, or `no_baseline` when none is fitted yet")},
    ("GET", "/v1/groups/{group_id}/figures"): {
        404: _not_found("`empty_group`: no detector has this group, or `no_baseline`")},
    ("GET", "/v1/groups/{group_id}/directional"): {
        404: _not_found("`empty_group`: either group has no detector, or `no_baseline`")},
    ("GET", "/v1/health"): {
        503: {"description": "The database is unreachable or its schema is not at the "
                             "migration head.",
              "content": _content({"$ref": REF + "HealthReport"})},
    },
}


def _permissions() -> dict[Callable[..., Any], str]:
    """The dependency callables behind ``deps.ReadDep`` etc., and the permission each needs."""
    found = {}
    for alias, permission in ((deps.ReadDep, "read"), (deps.IngestDep, "ingest"),
                              (deps.OperateDep, "operate"), (deps.AdminDep, "admin")):
        marker = typing.get_args(alias)[1]
        found[marker.dependency] = permission
    return found


def _api_routes(app: FastAPI) -> list[Any]:
    """The app's API routes with their full paths (newer FastAPI keeps included routers as
    lazy contexts; older ones copy each route into ``app.routes``)."""
    contexts = getattr(fastapi.routing, "iter_route_contexts", None)
    routes = contexts(app.routes) if contexts is not None else app.routes
    return [r for r in routes if isinstance(getattr(r, "original_route", r), APIRoute)]


def needed_permissions(app: FastAPI) -> dict[tuple[str, str], str | None]:
    """(method, path) of every API operation -> the permission its key needs (None: no key)."""
    permissions = _permissions()
    needed: dict[tuple[str, str], str | None] = {}
    for route in _api_routes(app):
        found = None
        stack = list(route.dependant.dependencies)
        while stack and found is None:
            dep = stack.pop()
            found = permissions.get(dep.call)
            stack.extend(dep.dependencies)
        for method in route.methods:
            needed[(method, route.path_format)] = found
    return needed


def _merge(into: dict[str, Any], extra: dict[str, Any]) -> None:
    for key, value in extra.items():
        if isinstance(value, dict) and isinstance(into.get(key), dict):
            _merge(into[key], value)
        else:
            into[key] = copy.deepcopy(value)


def _is_default_422(response: dict[str, Any]) -> bool:
    schema = response.get("content", {}).get("application/json", {}).get("schema", {})
    return schema.get("$ref") == REF + "HTTPValidationError"


def _responses_for(operation: dict[str, Any], method: str,
                   permission: str | None) -> dict[int, dict[str, Any]]:
    codes: dict[int, dict[str, Any]] = {400: BAD_REQUEST}
    if permission is not None:
        codes[401] = error("Missing, malformed, unknown or revoked API key; send "
                           "`Authorization: Bearer <key>`.")
        codes[403] = error(f"The key's role does not grant `{permission}`.")
    if "requestBody" in operation or method in ("POST", "PUT", "PATCH"):
        codes[413] = TOO_LARGE
    if operation.get("parameters") or "requestBody" in operation:
        codes[422] = INVALID
    codes[503] = UNAVAILABLE
    return codes


def publish(schema: dict[str, Any], permissions: dict[tuple[str, str], str | None]) -> None:
    """Complete a FastAPI-generated schema in place: error responses, models, key scheme."""
    for path, operations in schema.get("paths", {}).items():
        for method, operation in operations.items():
            key = (method.upper(), path)
            permission = permissions.get(key)
            responses = operation.setdefault("responses", {})
            # FastAPI's default 422 is replaced; what it generated otherwise (200s) is kept and
            # completed by EXTRA; the derived codes fill in what is still missing.
            if _is_default_422(responses.get("422", {})):
                del responses["422"]
            for code, response in EXTRA.get(key, {}).items():
                _merge(responses.setdefault(str(code), {}), response)
            for code, response in _responses_for(operation, key[0], permission).items():
                responses.setdefault(str(code), copy.deepcopy(response))
            operation["responses"] = {k: responses[k] for k in sorted(responses)}
            if permission is not None:
                operation["security"] = [{SCHEME: []}]
    components = schema.setdefault("components", {})
    schemas = components.setdefault("schemas", {})
    for name in ("HTTPValidationError", "ValidationError"):
        schemas.pop(name, None)
    for model in MODELS:
        published = model.model_json_schema(ref_template=REF + "{model}")
        schemas.update(published.pop("$defs", {}))
        schemas[model.__name__] = published
    components["schemas"] = {k: schemas[k] for k in sorted(schemas)}
    components["securitySchemes"] = {SCHEME: {
        "type": "http", "scheme": "bearer",
        "description": "An API key made with `tallyward keys create --role ROLE`; roles: ingest "
                       "(POST /v1/counts), read (every GET), operate (read, acknowledge "
                       "alerts, notes, out of / back in service), admin (everything)."}}


def error_headers(request: Request, exc: StarletteHTTPException) -> dict[str, str] | None:
    """Headers for an HTTP exception's response. A 405's Allow lists every method of the path
    (Starlette lists those of the first route that matched it, when a path has several)."""
    if exc.status_code != 405:
        return exc.headers
    path = request.url.path
    methods = sorted({m for r in _api_routes(request.app) if r.path_regex.match(path)
                      for m in r.methods})
    return {**(exc.headers or {}), "Allow": ", ".join(methods)} if methods else exc.headers


def document(app: FastAPI) -> None:
    """Publish every operation's real responses, the error model and the key scheme."""

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            schema = FastAPI.openapi(app)
            publish(schema, needed_permissions(app))
            app.openapi_schema = schema
        return app.openapi_schema

    app.openapi = openapi  # type: ignore[method-assign]
