"""Alerts for dashboards that poll: changes in strictly increasing ``seq`` order."""

from __future__ import annotations

from typing import Annotated, Any, Literal

import orjson
from fastapi import APIRouter, Path, Query, Request, Response
from pydantic import AfterValidator

from service.domain import DETECTOR_ID_PATTERN, INT32_MAX, INT64_MAX, KINDS, plain_text
from service.errors import ValidationFailed
from service.store import alerts as alert_store
from service.store.engine import read_transaction
from service.store.jobs import fit_state
from service.store.scoring import clock_now
from service.timefmt import format_utc
from service.web.deps import EngineDep, OperateDep, ReadDep, SettingsDep
from service.web.schemas import Acknowledgement, AlertPublic, AlertsPage, DetectorHealth

router = APIRouter(prefix="/v1/alerts", tags=["alerts"])
AlertId = Annotated[int, Path(ge=1, le=INT32_MAX, description="Alert id.")]
DetectorFilter = Annotated[str | None, Query(max_length=64, description="Only this detector."),
                           AfterValidator(plain_text)]
GroupFilter = Annotated[str | None, Query(max_length=64, description="Only this group."),
                        AfterValidator(plain_text)]
KindFilter = Annotated[str | None, Query(max_length=20, description="Only this kind."),
                       AfterValidator(plain_text)]


@router.get("", response_model=AlertsPage)
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
    polled = alert_store.poll(engine, after=after, status=status, detector_id=detector_id,
                              group=group, kind=kind, limit=limit, query=request.url.query,
                              if_none_match=request.headers.get("if-none-match"))
    if polled.page is None:
        return Response(status_code=304, headers={"ETag": polled.etag})
    # Serialised here (the ETag header goes with it); the shape is AlertsPage.
    return Response(orjson.dumps(polled.page), media_type="application/json",
                    headers={"ETag": polled.etag})


@router.get("/{alert_id}", response_model=AlertPublic)
def get_alert(alert_id: AlertId, engine: EngineDep, _: ReadDep) -> dict[str, Any]:
    """One alert."""
    return alert_store.get_alert(engine, alert_id)


@router.post("/{alert_id}/acknowledge", response_model=AlertPublic)
def acknowledge(alert_id: AlertId, ack: Acknowledgement, engine: EngineDep,
                _: OperateDep) -> dict[str, Any]:
    """Acknowledge an alert; it still closes on its own when the evidence ends."""
    return alert_store.acknowledge(engine, alert_id, by=ack.by, note=ack.note)


detector_router = APIRouter(prefix="/v1/detectors", tags=["alerts"])


@detector_router.get("/{detector_id}/health", response_model=DetectorHealth)
def detector_health(detector_id: Annotated[str, Path(pattern=DETECTOR_ID_PATTERN,
                                                    description="Detector id.")],
                    engine: EngineDep, settings: SettingsDep, _: ReadDep) -> dict[str, Any]:
    """Completeness, open alerts and share of intervals flagged over the last 24 h and 7 days."""
    figures = alert_store.detector_health(engine, detector_id,
                                          clock=lambda conn: clock_now(conn, settings))
    with read_transaction(engine) as conn:
        fit = fit_state(conn, detector_id, first_fit_days=settings.first_fit_days)
    next_refit = fit.pop("next_refit_s")
    fit["next_refit"] = format_utc(next_refit) if next_refit is not None else None
    return {"detector_id": detector_id, "clock": settings.clock,
            **{k: v for k, v in figures.items() if k != "detector_id"}, "baseline": fit}
