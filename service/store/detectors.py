"""The detector registry: create, update, list and bulk import (GeoJSON FeatureCollection)."""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from pydantic import ValidationError
from sqlalchemy import Connection, Engine, func, select, update
from sqlalchemy.exc import DataError, IntegrityError

from service.domain import SERVICE_STATES, control_character_error, detector_id_error
from service.errors import BadRequest, Forbidden, NotFound, ValidationFailed
from service.store import tables as models
from service.store.alerts import next_seqs
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


def public(row: Any, *, now: float | None = None) -> dict[str, Any]:
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
        "service": service_public(m, now=time.time() if now is None else now),
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


# ---------------------------------------------------------------------------- service states

RETURNED_BY_ITSELF = "returned to service by itself at the end of its out-of-service period"


def service_public(m: Any, *, now: float) -> dict[str, Any]:
    """A detector row's service state as shown: an out-of-service period whose ``until`` has
    passed shows as in service even before the sweep (``return_due``) has recorded it."""
    state, until = m["service_state"], m["service_until_s"]
    if state == "out_of_service" and until is not None and until <= now:
        return {"state": "in_service", "reason": RETURNED_BY_ITSELF, "by": None,
                "since": format_utc(until), "until": None}
    since = m["service_since_s"]
    return {"state": state, "reason": m["service_reason"], "by": m["service_by"],
            "since": format_utc(since) if since is not None else None,
            "until": format_utc(until) if until is not None else None}


@dataclass(frozen=True)
class MemberState:
    """What alerting needs of a detector's service state and scoring progress."""

    detector_id: str
    state: str  # as in force at the time asked (an expired out-of-service period is in_service)
    clock_s: int | None  # the scoring clock when the state was set (retirement's cut-off)
    has_baseline: bool
    scored_through_s: int | None


def member_states(conn: Connection, detector_ids: Sequence[str], *, now: float
                  ) -> dict[str, MemberState]:
    """Service state in force at ``now`` (wall clock) and scoring progress of each detector."""
    d, s = models.detectors, models.detector_state
    out: dict[str, MemberState] = {}
    ids = list(detector_ids)
    for i in range(0, len(ids), 500):
        rows = conn.execute(select(
            d.c.detector_id, d.c.service_state, d.c.service_until_s, d.c.service_clock_s,
            s.c.baseline_id, s.c.scored_through_s)
            .select_from(d.outerjoin(s, s.c.detector_id == d.c.detector_id))
            .where(d.c.detector_id.in_(ids[i:i + 500])))
        for r in rows:
            state = r.service_state
            if state == "out_of_service" and r.service_until_s is not None \
                    and r.service_until_s <= now:
                state = "in_service"
            out[r.detector_id] = MemberState(r.detector_id, state, r.service_clock_s,
                                             r.baseline_id is not None, r.scored_through_s)
    return out


def _unsuppress_open(conn: Connection, detector_id: str, *, now: float) -> int:
    """Raise the detector's open suppressed alerts (each with a new seq); how many."""
    a = models.alerts
    ids = [r[0] for r in conn.execute(select(a.c.alert_id).where(
        a.c.detector_id == detector_id, a.c.suppressed == 1, a.c.status == "open",
        a.c.withdrawn == 0).order_by(a.c.start_s))]
    if not ids:
        return 0
    for alert_id, seq in zip(ids, next_seqs(conn, len(ids)), strict=True):
        conn.execute(update(a).where(a.c.alert_id == alert_id).values(
            suppressed=0, seq=seq, updated_s=now))
    return len(ids)


def set_service_state(engine: Engine, detector_id: str, *, state: str, reason: str | None,
                      until_s: float | None, by: str, may_retire: bool,
                      clock: Callable[[Connection], float], now: float | None = None,
                      period_clock: Callable[[Connection], float] | None = None
                      ) -> dict[str, Any]:
    """Put a detector in or out of service, or retire it; the detector afterwards.

    Out of service: new alerts are kept as suppressed until it returns (at ``until_s``, wall
    clock, or by a later change). Returning to service raises its suppressed alerts that are
    still open. Retiring, or changing a retired detector, needs ``may_retire`` (admin).
    Retiring marks the detector for rescoring from ``clock(conn)`` (the scoring clock), so
    that missing data from then on stops being evidence.

    In the same transaction the detector's out-of-service period (``service_periods``) is
    opened or closed at ``period_clock(conn)`` (default ``clock``): the clock count starts are
    on. A second out_of_service closes the open period and opens the next at the same time,
    so each reason is kept."""
    now = time.time() if now is None else now
    if state not in SERVICE_STATES:
        raise ValidationFailed(f"unknown service state {state!r}; states are "
                               f"{', '.join(SERVICE_STATES)}")
    if until_s is not None and state != "out_of_service":
        raise ValidationFailed(f"until applies to out_of_service only, not to {state}; "
                               "leave it out")
    if until_s is not None and until_s <= now:
        raise ValidationFailed(f"until {format_utc(until_s)} is not in the future (now "
                               f"{format_utc(now)}); give a later time, or no until to keep "
                               "the detector out of service until changed")
    if state in ("out_of_service", "retired") and not (reason and reason.strip()):
        raise ValidationFailed(f"a reason is required to set {state} (what is wrong, or the "
                               "work order)")
    d = models.detectors
    with write_transaction(engine) as conn:
        row = conn.execute(select(d.c.service_state).where(
            d.c.detector_id == detector_id)).first()
        if row is None:
            raise NotFound(f"unknown detector {detector_id!r}")
        if not may_retire and "retired" in (state, row.service_state):
            raise Forbidden("only an admin key may retire a detector or return a retired one "
                            "to service; operate keys may set in_service and out_of_service")
        clock_s = clock(conn)
        at_s = clock_s if period_clock is None else period_clock(conn)
        conn.execute(update(d).where(d.c.detector_id == detector_id).values(
            service_state=state, service_reason=reason, service_by=by, service_since_s=now,
            service_until_s=until_s, service_clock_s=int(clock_s), updated_s=now))
        close_service_period(conn, detector_id, to_s=at_s, by=by)
        if state == "out_of_service":
            conn.execute(models.service_periods.insert().values(
                detector_id=detector_id, from_s=at_s, reason=reason, actor=by))
        if state == "in_service":
            _unsuppress_open(conn, detector_id, now=now)
        if state == "retired" or row.service_state == "retired":
            _rescore_from(conn, detector_id, int(clock_s), now=now)
        full = conn.execute(select(d).where(d.c.detector_id == detector_id)).one()
    return public(full, now=now)


def _rescore_from(conn: Connection, detector_id: str, from_s: int, *, now: float) -> None:
    """Mark a detector with a baseline for rescoring from ``from_s`` (as ingest does)."""
    s = models.detector_state
    dirty = conn.execute(select(s.c.dirty_from_s).where(s.c.detector_id == detector_id)).first()
    if dirty is None:  # no baseline yet: nothing scored, nothing to redo
        return
    start = from_s if dirty.dirty_from_s is None else min(int(dirty.dirty_from_s), from_s)
    conn.execute(update(s).where(s.c.detector_id == detector_id).values(
        dirty_from_s=start, pending_since_s=func.coalesce(s.c.pending_since_s, now)))


def close_service_period(conn: Connection, detector_id: str, *, to_s: float | None = None,
                         by: str | None = None, until_s: float | None = None,
                         since_s: float | None = None) -> None:
    """Close the detector's open out-of-service period, if any: at ``to_s`` (scoring clock),
    or, when it ended by itself, as long after its start as ``since_s``..``until_s`` (wall
    clock) lasted, so a replay's data-clock period keeps its declared length."""
    p = models.service_periods
    open_period = conn.execute(select(p.c.period_id, p.c.from_s).where(
        p.c.detector_id == detector_id, p.c.to_s.is_(None))
        .order_by(p.c.from_s.desc()).limit(1)).first()
    if open_period is None:
        return
    if to_s is None:
        length = (until_s - since_s) if until_s is not None and since_s is not None else 0.0
        to_s = open_period.from_s + max(length, 0.0)
    conn.execute(update(p).where(p.c.period_id == open_period.period_id).values(
        to_s=max(to_s, open_period.from_s), closed_by=by))


def service_periods(engine: Engine, detector_id: str, *, limit: int = 100) -> dict[str, Any]:
    """The detector's out-of-service periods, newest first (at most ``limit``); ``NotFound``
    for an unknown detector. An open period has ``until`` null."""
    p = models.service_periods
    with read_transaction(engine) as conn:
        if conn.execute(select(models.detectors.c.detector_id).where(
                models.detectors.c.detector_id == detector_id)).first() is None:
            raise NotFound(f"unknown detector {detector_id!r}")
        rows = conn.execute(select(p).where(p.c.detector_id == detector_id)
                            .order_by(p.c.from_s.desc(), p.c.period_id.desc())
                            .limit(limit)).all()
    return {"detector_id": detector_id, "periods": [
        {"from": format_utc(r.from_s), "until": None if r.to_s is None else format_utc(r.to_s),
         "reason": r.reason, "by": r.actor, "closed_by": r.closed_by} for r in rows]}


def return_due(engine: Engine, *, now: float | None = None) -> list[str]:
    """Return to service every detector whose out-of-service period has ended (``until``
    passed, wall clock), raising its still-open suppressed alerts; the ids returned.

    Cheap when nothing is due (one index look-up), so every scoring pass may call it."""
    now = time.time() if now is None else now
    d = models.detectors
    due = (select(d.c.detector_id).where(d.c.service_until_s <= now,
                                         d.c.service_state == "out_of_service")
           .order_by(d.c.detector_id))
    with read_transaction(engine) as conn:
        if conn.execute(due.limit(1)).first() is None:
            return []
    with write_transaction(engine) as conn:
        ids = [r[0] for r in conn.execute(due)]
        for detector_id in ids:
            was = conn.execute(select(d.c.service_until_s, d.c.service_since_s).where(
                d.c.detector_id == detector_id)).one()
            conn.execute(update(d).where(d.c.detector_id == detector_id).values(
                service_state="in_service", service_reason=RETURNED_BY_ITSELF, service_by=None,
                service_since_s=was.service_until_s, service_until_s=None, updated_s=now))
            close_service_period(conn, detector_id, until_s=was.service_until_s,
                                 since_s=was.service_since_s)
            _unsuppress_open(conn, detector_id, now=now)
    return ids


def detector_count(conn: Connection) -> int:
    """Registered detectors (the network size a network-wide false-alert cap is shared by)."""
    return int(conn.execute(select(func.count()).select_from(models.detectors)).scalar_one())
