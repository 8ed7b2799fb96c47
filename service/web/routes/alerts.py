"""Alerts for dashboards that poll: changes in strictly increasing ``seq`` order."""

from __future__ import annotations

import hashlib
import math
import time
from typing import Annotated, Any, Literal

import orjson
from fastapi import APIRouter, Path, Query, Request, Response
from pydantic import AfterValidator, BaseModel, Field
from sqlalchemy import Connection, func, select

from service.domain import DETECTOR_ID_PATTERN, INT32_MAX, INT64_MAX, plain_text, prose
from service.errors import NotFound, ValidationFailed
from service.pipeline.score import KINDS, next_seqs
from service.store import tables as models
from service.store.engine import read_transaction, write_transaction
from service.timefmt import format_utc
from service.web.deps import EngineDep, OperateDep, ReadDep, SettingsDep

router = APIRouter(prefix="/v1/alerts", tags=["alerts"])
LN10 = math.log(10.0)
AlertId = Annotated[int, Path(ge=1, le=INT32_MAX, description="Alert id.")]
DetectorFilter = Annotated[str | None, Query(max_length=64, description="Only this detector."),
                           AfterValidator(plain_text)]
GroupFilter = Annotated[str | None, Query(max_length=64, description="Only this group."),
                        AfterValidator(plain_text)]
KindFilter = Annotated[str | None, Query(max_length=20, description="Only this kind."),
                       AfterValidator(plain_text)]


def alert_public(row: Any, interval_s: int | None) -> dict[str, Any]:
    m = row._mapping
    log_p = m["log_p"]
    ack = None
    if m["acknowledged_by"] is not None:
        ack = {"by": m["acknowledged_by"], "at": format_utc(m["acknowledged_s"]),
               "note": m["ack_note"]}
    step = interval_s or 0
    return {
        "id": m["alert_id"], "seq": m["seq"], "detector_id": m["detector_id"],
        "group": m["group_id"], "kind": m["kind"], "cause": m["cause"], "status": m["status"],
        "withdrawn": bool(m["withdrawn"]),
        "start": format_utc(m["start_s"]), "end": format_utc(m["end_s"] + step),
        "closed_at": format_utc(m["closed_s"]) if m["closed_s"] is not None else None,
        "intervals": m["n_intervals"],
        "observed": m["observed"], "expected": None if m["expected"] is None else round(m["expected"], 1),
        "p_value": math.exp(log_p) if log_p is not None else None,
        "score": round(-log_p / LN10, 2) if log_p is not None else None,
        "baseline_id": m["baseline_id"], "summary": m["summary"],
        "detectors": orjson.loads(m["detectors"]) if m["detectors"] else None,
        "acknowledged": ack,
    }


def _intervals(conn: Connection) -> dict[str, int]:
    d = models.detectors
    return {r.detector_id: r.interval_s for r in conn.execute(select(d.c.detector_id, d.c.interval_s))}


@router.get("")
def list_alerts(
    request: Request, engine: EngineDep, _: ReadDep,
    after: Annotated[int, Query(ge=0, le=INT64_MAX,
                                description="Return changes with seq greater than this.")] = 0,
    status: Annotated[Literal["open", "closed", "any"], Query()] = "any",
    detector_id: DetectorFilter = None, group: GroupFilter = None, kind: KindFilter = None,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
) -> Response:
    """Alert changes after `after`, in seq order; poll again with `next_after`."""
    if kind is not None and kind not in KINDS:
        raise ValidationFailed(f"unknown kind {kind!r}; kinds are {', '.join(KINDS)}")
    a = models.alerts
    with read_transaction(engine) as conn:
        if detector_id is not None:
            d = models.detectors
            if conn.execute(select(d.c.detector_id).where(d.c.detector_id == detector_id)).first() is None:
                raise NotFound(f"unknown detector {detector_id!r}")
        high = conn.execute(select(models.counters.c.value)
                            .where(models.counters.c.name == "alert_seq")).scalar_one()
        tag = hashlib.sha1(f"{high}|{request.url.query}".encode()).hexdigest()[:20]
        etag = f'"{tag}"'
        if request.headers.get("if-none-match") == etag:
            return Response(status_code=304, headers={"ETag": etag})
        q = select(a).where(a.c.seq > after, a.c.part_of.is_(None))
        if status != "any":
            q = q.where(a.c.status == status)
        if detector_id is not None:
            q = q.where(a.c.detector_id == detector_id)
        if group is not None:
            q = q.where(a.c.group_id == group)
        if kind is not None:
            q = q.where(a.c.kind == kind)
        rows = conn.execute(q.order_by(a.c.seq).limit(limit)).all()
        intervals = _intervals(conn) if rows else {}
    data = [alert_public(r, intervals.get(r.detector_id) or _group_step(r, intervals)) for r in rows]
    # With filters, rows skipped between seqs are not this poller's business: it may jump to
    # the highest seq committed when the page is not full.
    next_after = data[-1]["seq"] if len(data) == limit else max(after, high if not data else
                                                                  max(data[-1]["seq"], high))
    body = {"data": data, "next_after": next_after}
    return Response(orjson.dumps(body), media_type="application/json", headers={"ETag": etag})


def _group_step(row: Any, intervals: dict[str, int]) -> int | None:
    members = orjson.loads(row.detectors) if row.detectors else []
    steps = [intervals[m] for m in members if m in intervals]
    return min(steps) if steps else None


def _get(conn: Connection, alert_id: int) -> dict[str, Any]:
    a = models.alerts
    row = conn.execute(select(a).where(a.c.alert_id == alert_id)).first()
    if row is None:
        raise NotFound(f"unknown alert {alert_id}")
    intervals = _intervals(conn)
    return alert_public(row, intervals.get(row.detector_id) or _group_step(row, intervals))


@router.get("/{alert_id}")
def get_alert(alert_id: AlertId, engine: EngineDep, _: ReadDep) -> dict[str, Any]:
    """One alert."""
    with read_transaction(engine) as conn:
        return _get(conn, alert_id)


class Acknowledgement(BaseModel):
    by: Annotated[str, Field(min_length=1, max_length=100), AfterValidator(plain_text)] = Field(
        description="Who acknowledges (name or desk); no control characters.")
    note: Annotated[str | None, Field(max_length=2000), AfterValidator(prose)] = Field(
        None, description="Free text; may hold tabs and line breaks, no other control characters.")


@router.post("/{alert_id}/acknowledge")
def acknowledge(alert_id: AlertId, ack: Acknowledgement, engine: EngineDep,
                _: OperateDep) -> dict[str, Any]:
    """Acknowledge an alert; it still closes on its own when the evidence ends."""
    a = models.alerts
    with write_transaction(engine) as conn:
        if conn.execute(select(a.c.alert_id).where(a.c.alert_id == alert_id)).first() is None:
            raise NotFound(f"unknown alert {alert_id}")
        (seq,) = next_seqs(conn, 1)
        conn.execute(a.update().where(a.c.alert_id == alert_id).values(
            acknowledged_by=ack.by, ack_note=ack.note, acknowledged_s=time.time(), seq=seq,
            updated_s=time.time()))
        return _get(conn, alert_id)


detector_router = APIRouter(prefix="/v1/detectors", tags=["alerts"])


@detector_router.get("/{detector_id}/health")
def detector_health(detector_id: Annotated[str, Path(pattern=DETECTOR_ID_PATTERN,
                                                    description="Detector id.")],
                    engine: EngineDep, settings: SettingsDep, _: ReadDep) -> dict[str, Any]:
    """Completeness, open alerts and share of intervals flagged over the last 24 h and 7 days."""
    from service.pipeline.score import clock_now

    d, c, e, a = models.detectors, models.counts, models.evidence, models.alerts
    with read_transaction(engine) as conn:
        det = conn.execute(select(d.c.interval_s).where(d.c.detector_id == detector_id)).first()
        if det is None:
            raise NotFound(f"unknown detector {detector_id!r}")
        now = int(clock_now(conn, settings))
        open_alerts = conn.execute(select(a.c.alert_id, a.c.kind, a.c.start_s).where(
            a.c.detector_id == detector_id, a.c.status == "open", a.c.withdrawn == 0)
            .order_by(a.c.start_s)).all()
        windows = {}
        for name, span in (("last_24h", 86_400), ("last_7d", 7 * 86_400)):
            lo = now - span
            present = conn.execute(select(func.count()).select_from(c).where(
                c.c.detector_id == detector_id, c.c.start_s >= lo, c.c.start_s < now)).scalar_one()
            flagged = conn.execute(select(func.count(func.distinct(e.c.start_s))).where(
                e.c.detector_id == detector_id, e.c.start_s >= lo, e.c.start_s < now)).scalar_one()
            intervals = span // det.interval_s
            windows[name] = {"from": format_utc(lo), "until": format_utc(now),
                             "intervals": intervals, "reported": present,
                             "completeness": round(present / intervals, 4),
                             "flagged_share": round(flagged / intervals, 4)}
    return {"detector_id": detector_id, "clock": settings.clock, **windows,
            "open_alerts": [{"id": r.alert_id, "kind": r.kind, "start": format_utc(r.start_s)}
                            for r in open_alerts]}
