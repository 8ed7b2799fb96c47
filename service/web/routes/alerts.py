"""Alerts for dashboards that poll: changes in strictly increasing ``seq`` order."""

from __future__ import annotations

from typing import Annotated, Any, Literal

import orjson
from fastapi import APIRouter, Path, Query, Request, Response
from pydantic import AfterValidator

from service.domain import DETECTOR_ID_PATTERN, INT32_MAX, INT64_MAX, KINDS, plain_text
from service.errors import ValidationFailed
from service.store import alerts as alert_store
from service.store import detectors as registry
from service.store.engine import read_transaction
from service.store.jobs import fit_state
from service.store.scoring import clock_now
from service.timefmt import format_utc, parse_rfc3339
from service.web import paging
from service.web.deps import EngineDep, OperateDep, ReadDep, SettingsDep
from service.web.schemas import (
    Acknowledgement,
    AlertDetail,
    AlertNote,
    AlertsPage,
    DetectorHealth,
)

router = APIRouter(prefix="/v1/alerts", tags=["alerts"])
AlertId = Annotated[int, Path(ge=1, le=INT32_MAX, description="Alert id.")]
DetectorFilter = Annotated[str | None, Query(max_length=64, description="Only this detector."),
                           AfterValidator(plain_text)]
GroupFilter = Annotated[str | None, Query(max_length=64, description="Only this group."),
                        AfterValidator(plain_text)]
KindFilter = Annotated[str | None, Query(max_length=20, description="Only this kind."),
                       AfterValidator(plain_text)]
TimeFilter = Annotated[str | None, Query(max_length=64), AfterValidator(plain_text)]


def _time(name: str, text: str | None) -> int | None:
    if text is None:
        return None
    try:
        return parse_rfc3339(text)
    except ValueError as exc:
        raise ValidationFailed(f"{name}: {str(exc).replace('start ', '', 1)}") from None


ALERT_CSV_COLUMNS = ("id", "seq", "detector_id", "group", "kind", "cause", "status",
                     "withdrawn", "start", "end", "closed_at", "intervals", "observed",
                     "expected", "p_value", "score", "baseline_id", "summary", "detectors",
                     "suppressed")
ALERTS_CSV = {200: {"content": {"text/csv": {"schema": {"type": "string"}}},
                    "description": "JSON (AlertsPage), or CSV with Accept: text/csv (columns "
                                   f"{', '.join(ALERT_CSV_COLUMNS)}; poll on with the "
                                   "`Tallyward-Next-After` header)."}}


def _alert_csv_row(alert: dict[str, Any]) -> list[Any]:
    return [" ".join(alert[c] or ()) if c == "detectors" else alert.get(c, False)
            if c == "suppressed" else alert[c] for c in ALERT_CSV_COLUMNS]


@router.get("", response_model=AlertsPage, responses=ALERTS_CSV)
def list_alerts(
    request: Request, engine: EngineDep, _: ReadDep,
    after: Annotated[int, Query(ge=0, le=INT64_MAX,
                                description="Return changes with seq greater than this.")] = 0,
    status: Annotated[Literal["open", "closed", "any"], Query()] = "any",
    detector_id: DetectorFilter = None, group: GroupFilter = None, kind: KindFilter = None,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
    start_after: Annotated[TimeFilter, Query(description="Only alerts starting at or after "
                                                         "this RFC 3339 time.")] = None,
    start_before: Annotated[TimeFilter, Query(description="Only alerts starting before this "
                                                          "RFC 3339 time.")] = None,
    suppressed: Annotated[bool, Query(description="Also list alerts raised while their "
                                                  "detector was out of service.")] = False,
) -> Response:
    """Alert changes after `after`, in seq order; poll again with `next_after`."""
    if kind is not None and kind not in KINDS:
        raise ValidationFailed(f"unknown kind {kind!r}; kinds are {', '.join(KINDS)}")
    lo, hi = _time("start_after", start_after), _time("start_before", start_before)
    if lo is not None and hi is not None and lo >= hi:
        raise ValidationFailed(f"start_after ({start_after}) must be earlier than start_before "
                               f"({start_before}); the range is empty")
    as_csv = paging.wants_csv(request)  # CSV answers carry no ETag (one per representation)
    polled = alert_store.poll(engine, after=after, status=status, detector_id=detector_id,
                              group=group, kind=kind, limit=limit, query=request.url.query,
                              if_none_match=None if as_csv else request.headers.get("if-none-match"),
                              start_after_s=lo, start_before_s=hi, suppressed=suppressed)
    if polled.page is None:
        return Response(status_code=304, headers={"ETag": polled.etag})
    if as_csv:
        return paging.csv_response(
            paging.csv_text(ALERT_CSV_COLUMNS, map(_alert_csv_row, polled.page["data"])),
            filename="alerts.csv", headers={"Tallyward-Next-After": str(polled.page["next_after"])})
    # Serialised here (the ETag header goes with it); the shape is AlertsPage.
    return Response(orjson.dumps(polled.page), media_type="application/json",
                    headers={"ETag": polled.etag})


@router.get("/{alert_id}", response_model=AlertDetail)
def get_alert(alert_id: AlertId, engine: EngineDep, _: ReadDep) -> dict[str, Any]:
    """One alert, with its history of acknowledgements and notes."""
    return alert_store.get_alert(engine, alert_id)


@router.post("/{alert_id}/acknowledge", response_model=AlertDetail)
def acknowledge(alert_id: AlertId, ack: Acknowledgement, engine: EngineDep,
                principal: OperateDep) -> dict[str, Any]:
    """Acknowledge an alert (appended to its history); it still closes on its own."""
    return alert_store.acknowledge(engine, alert_id, by=ack.by, note=ack.note,
                                   key_name=principal.name)


@router.post("/{alert_id}/unacknowledge", response_model=AlertDetail)
def unacknowledge(alert_id: AlertId, ack: Acknowledgement, engine: EngineDep,
                  principal: OperateDep) -> dict[str, Any]:
    """Withdraw the acknowledgement in force (appended to the history); 422 if none."""
    return alert_store.unacknowledge(engine, alert_id, by=ack.by, note=ack.note,
                                     key_name=principal.name)


@router.post("/{alert_id}/notes", response_model=AlertDetail)
def add_note(alert_id: AlertId, note: AlertNote, engine: EngineDep,
             principal: OperateDep) -> dict[str, Any]:
    """Append a note to an alert's history."""
    return alert_store.add_note(engine, alert_id, by=note.by, note=note.note,
                                key_name=principal.name)


detector_router = APIRouter(prefix="/v1/detectors", tags=["alerts"])


@detector_router.get("/{detector_id}/health", response_model=DetectorHealth)
def detector_health(detector_id: Annotated[str, Path(pattern=DETECTOR_ID_PATTERN,
                                                    description="Detector id.")],
                    engine: EngineDep, settings: SettingsDep, _: ReadDep) -> dict[str, Any]:
    """Completeness, open alerts, flagged share (last 24 h and 7 days) and service state."""
    figures = alert_store.detector_health(engine, detector_id,
                                          clock=lambda conn: clock_now(conn, settings))
    service = registry.get_detector(engine, detector_id)["service"]
    with read_transaction(engine) as conn:
        fit = fit_state(conn, detector_id, first_fit_days=settings.first_fit_days)
    next_refit = fit.pop("next_refit_s")
    fit["next_refit"] = format_utc(next_refit) if next_refit is not None else None
    return {"detector_id": detector_id, "clock": settings.clock, "service": service,
            **{k: v for k, v in figures.items() if k != "detector_id"}, "baseline": fit}
