"""The detector registry: create, update, list and bulk import (GeoJSON FeatureCollection)."""

from __future__ import annotations

import time
from typing import Any

from pydantic import ValidationError
from sqlalchemy import Connection, Engine, func, select
from sqlalchemy.exc import DataError, IntegrityError

from service.domain import control_character_error, detector_id_error
from service.errors import BadRequest, NotFound, ValidationFailed
from service.store import tables as models
from service.store.engine import read_transaction, write_transaction
from service.store.records import DetectorCreate, FeatureIn
from service.timefmt import format_utc


def check_detector_id(detector_id: str) -> str:
    problem = detector_id_error(detector_id)
    if problem:
        raise ValidationFailed(problem)
    return detector_id


def _row_values(spec: DetectorCreate) -> dict[str, Any]:
    lon = lat = None
    if spec.location is not None:
        lon, lat = spec.location.coordinates[0], spec.location.coordinates[1]
    return {
        "label": spec.label, "group_id": spec.group, "road_class": spec.road_class,
        "lanes": spec.lanes, "interval_s": spec.interval_s, "timezone": spec.timezone,
        "holiday_calendar": spec.holiday_calendar, "lon": lon, "lat": lat,
        "capacity_per_lane_h": spec.capacity_per_lane_h,
    }


def upsert_detector(conn: Connection, detector_id: str, spec: DetectorCreate) -> bool:
    """Create or update one detector; returns True when created."""
    check_detector_id(detector_id)
    d = models.detectors
    now = time.time()
    values = _row_values(spec)
    existing = conn.execute(select(d.c.interval_s).where(d.c.detector_id == detector_id)).first()
    if existing is None:
        conn.execute(d.insert().values(detector_id=detector_id, created_s=now, updated_s=now, **values))
        return True
    if existing.interval_s != spec.interval_s:
        has_counts = conn.execute(
            select(models.counts.c.start_s).where(models.counts.c.detector_id == detector_id).limit(1)
        ).first()
        if has_counts is not None:
            raise ValidationFailed(
                f"detector {detector_id!r} already has counts at interval_s={existing.interval_s}; "
                "the interval cannot change once counts are stored (register a new detector id)",
                code="interval_locked")
    conn.execute(d.update().where(d.c.detector_id == detector_id).values(updated_s=now, **values))
    return False


def public(row: Any) -> dict[str, Any]:
    m = row._mapping
    location = None
    if m["lon"] is not None and m["lat"] is not None:
        location = {"type": "Point", "coordinates": [m["lon"], m["lat"]]}
    return {
        "detector_id": m["detector_id"], "interval_s": m["interval_s"], "lanes": m["lanes"],
        "timezone": m["timezone"], "group": m["group_id"], "label": m["label"],
        "road_class": m["road_class"], "holiday_calendar": m["holiday_calendar"],
        "location": location, "capacity_per_lane_h": m["capacity_per_lane_h"],
        "created": format_utc(m["created_s"]), "updated": format_utc(m["updated_s"]),
    }


def get_detector(engine: Engine, detector_id: str) -> dict[str, Any]:
    d = models.detectors
    with read_transaction(engine) as conn:
        row = conn.execute(select(d).where(d.c.detector_id == detector_id)).first()
    if row is None:
        raise NotFound(f"unknown detector {detector_id!r}")
    return public(row)


def list_detectors(engine: Engine, *, group: str | None = None, limit: int = 1000,
                   after: str | None = None) -> tuple[list[dict[str, Any]], int]:
    for name, value in (("group", group), ("after", after)):
        problem = control_character_error(value) if value is not None else None
        if problem:  # PostgreSQL would refuse a NUL in the query with a server error
            raise ValidationFailed(f"{name} {problem}")
    d = models.detectors
    q = select(d).order_by(d.c.detector_id)
    total_q = select(func.count()).select_from(d)
    if group is not None:
        q = q.where(d.c.group_id == group)
        total_q = total_q.where(d.c.group_id == group)
    if after is not None:
        q = q.where(d.c.detector_id > after)
    with read_transaction(engine) as conn:
        rows = conn.execute(q.limit(limit)).all()
        total = conn.execute(total_q).scalar_one()
    return [public(r) for r in rows], total


def feature_to_spec(feature: dict[str, Any]) -> tuple[str, DetectorCreate]:
    """A GeoJSON Feature (RFC 7946) to a detector id and its registry fields."""
    parsed = FeatureIn.model_validate(feature)
    props = dict(parsed.properties)
    detector_id = props.pop("detector_id", parsed.id)
    if not isinstance(detector_id, (str, int)) or isinstance(detector_id, bool):
        raise ValidationFailed(f"detector_id is a JSON {type(detector_id).__name__}; "
                               "it must be a string (or the Feature's id)")
    if parsed.geometry is not None and "location" not in props:
        props["location"] = parsed.geometry
    return check_detector_id(str(detector_id)), DetectorCreate.model_validate(props)


def import_feature_collection(engine: Engine, doc: Any) -> dict[str, Any]:
    """Create or update every valid detector of a FeatureCollection in one transaction.

    Partial by design, like a count batch: every feature is validated first (ids, control
    characters, fields); the valid ones are stored and each bad one is listed in ``errors``
    with its index and message. An unusable document (not a FeatureCollection) raises
    ``BadRequest`` and stores nothing. Detectors are written in id order, so two imports at
    once cannot deadlock."""
    if not isinstance(doc, dict) or doc.get("type") != "FeatureCollection" \
            or not isinstance(doc.get("features"), list):
        raise BadRequest('a detector file is a GeoJSON FeatureCollection (RFC 7946): '
                         '{"type": "FeatureCollection", "features": [...]}')
    specs: list[tuple[int, str, DetectorCreate]] = []
    errors: list[dict[str, Any]] = []
    seen: dict[str, int] = {}
    for i, feature in enumerate(doc["features"]):
        try:
            det, spec = feature_to_spec(feature)
        except ValidationError as exc:
            errors.append({"index": i, "error": _pydantic_message(exc)})
            continue
        except ValidationFailed as exc:
            errors.append({"index": i, "error": exc.message})
            continue
        if det in seen:
            errors.append({"index": i, "detector_id": det,
                           "error": f"detector {det!r} appears twice (first at feature {seen[det]})"})
            continue
        seen[det] = i
        specs.append((i, det, spec))
    created = updated = 0
    with write_transaction(engine) as conn:
        for i, det, spec in sorted(specs, key=lambda s: s[1]):
            try:
                with conn.begin_nested():
                    if upsert_detector(conn, det, spec):
                        created += 1
                    else:
                        updated += 1
            except ValidationFailed as exc:
                errors.append({"index": i, "detector_id": det, "error": exc.message})
            except (DataError, IntegrityError) as exc:
                # Only this feature's savepoint is rolled back; the others still stand.
                errors.append({"index": i, "detector_id": det, "error": (
                    f"the database refused this detector ({type(exc.orig).__name__}: "
                    f"{str(exc.orig).splitlines()[0][:200]})")})
    errors.sort(key=lambda e: e["index"])
    message = f"{created} created, {updated} updated, {len(errors)} rejected"
    if errors:
        message += "; the rejected features were not stored: see errors (the others were)"
    return {"message": message, "created": created, "updated": updated, "errors": errors}


def _pydantic_message(exc: ValidationError) -> str:
    parts = []
    for err in exc.errors():
        where = ".".join(str(p) for p in err["loc"])
        parts.append(f"{where}: {err['msg']}" if where else err["msg"])
    return "; ".join(parts)


def detector_count(conn: Connection) -> int:
    """Registered detectors (the network size a network-wide false-alert cap is shared by)."""
    return int(conn.execute(select(func.count()).select_from(models.detectors)).scalar_one())
