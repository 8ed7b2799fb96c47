"""Request and response models (pydantic). Counts are parsed by ``service.pipeline.ingest`` for speed."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
)

from service.domain import (
    ALERT_STATUSES,
    CAUSES,
    DAY_TYPES,
    HISTORY_ACTIONS,
    INT32_MAX,
    KINDS,
    SERVICE_STATES,
    plain_text,
    prose,
)
from service.store.records import DetectorCreate


class ServiceStatePublic(BaseModel):
    state: Literal[SERVICE_STATES] = Field(  # type: ignore[valid-type]
        description="'in_service' (default), 'out_of_service' (alerts kept as suppressed), "
        "'retired' (not expected to report: no missing-data alerts).")
    reason: str | None = Field(description="Why, as given when the state was set.")
    by: str | None = Field(description="Name of the API key that set the state.")
    since: str | None = Field(description="When the state was set (RFC 3339, UTC).")
    until: str | None = Field(description="Out of service: when it returns to service by "
                                          "itself; null when set until changed.")


class DetectorPublic(DetectorCreate):
    detector_id: str
    created: str
    updated: str
    service: ServiceStatePublic | None = None


class DetectorsPublic(BaseModel):
    data: list[DetectorPublic]
    count: int


class DetectorImportResult(BaseModel):
    message: str
    created: int
    updated: int
    errors: list[dict[str, Any]]


# ---------------------------------------------------------------------------- baselines


class FitRequest(BaseModel):
    model_config = ConfigDict(extra="forbid")
    detector_ids: list[str] | None = Field(None, description="Default: every detector.")
    as_of: str | None = Field(None, description="RFC 3339 end of the history window; default: "
                                                "just after the latest stored count.")


class FitOutcome(BaseModel):
    detector_id: str
    status: str = Field(description="'fitted', 'insufficient_history' or 'failed'.")
    reason: str | None = Field(description="Why the fit did not happen, when it did not.")
    baseline_id: int | None = Field(description="The stored baseline, when fitted.")


class FitResult(BaseModel):
    seconds: float = Field(description="Wall time the fits took.")
    data: list[FitOutcome]


class TimeWindow(BaseModel):
    start: str
    end: str


class BaselineModel(BaseModel):
    """The fitted profile a baseline day is served from."""

    baseline_id: int
    fitted_at: str
    window: TimeWindow = Field(description="History window of the fit (RFC 3339, UTC).")
    day_type: Literal[DAY_TYPES]  # type: ignore[valid-type]
    fitted_from: str = Field(description="Day type whose days the profile was fitted from.")
    fallback: bool = Field(description="True when fitted from another day type (too few days).")
    distribution: str = Field(description="'poisson' or 'negative_binomial'.")
    day_alpha: float
    interval_alpha: float
    dispersion_p_value: float | None
    days_used: int


class BaselinePoint(BaseModel):
    start: str = Field(description="Local interval start: RFC 3339 for a date, HH:MM for a "
                                   "day type.")
    expected: float = Field(description="Expected vehicles in the interval.")
    low: int = Field(description="Lower end of the predictive interval (vehicles).")
    high: int = Field(description="Upper end of the predictive interval (vehicles).")


class BaselineDay(BaseModel):
    detector_id: str
    date: str | None = Field(description="The local date asked for, or null for a day type.")
    day_type: Literal[DAY_TYPES]  # type: ignore[valid-type]
    level: float = Field(description="Central predictive interval level.")
    interval_s: int
    model: BaselineModel
    expected_total: float = Field(description="Expected vehicles over the whole local day.")
    warning: str | None = Field(None, description="Set when the date lies further outside the "
                                "fit window than the configured validity (also sent as the "
                                "X-Baseline-Warning header).")
    data: list[BaselinePoint]


class BaselineProfile(BaseModel):
    detector_id: str
    lanes: int
    baseline_id: int
    fitted_at: str
    fit: dict[str, Any] = Field(description="What the fit found (per day type: days used, "
                                            "distribution, fallback).")
    day_types: dict[str, Any] = Field(description="Per day type: expected daily volume, hourly "
                                                  "volumes and the busiest expected hour with its "
                                                  "share of the expected day (not K30; see "
                                                  "/figures).")


# ---------------------------------------------------------------------------- counts


class CountPublic(BaseModel):
    detector_id: str
    start: str = Field(description="RFC 3339 interval start (UTC).")
    count: int
    flag: str = Field(description="Quality flag (service.store.quality), the first that "
                                   "applies: corrected (replaced by an admin correction; used "
                                   "as observed by the clean volumes), out_of_service (the "
                                   "start lies in a period the detector was out of service; "
                                   "imputed by the clean volumes), alert:<kind>[:traffic] "
                                   "(inside an alert episode), an evidence kind (e.g. "
                                   "high_volume), or ok.")


class CountsPage(BaseModel):
    detector_id: str | None = Field(description="The detector asked for, or null.")
    group: str | None = Field(description="The group asked for, or null.")
    data: list[CountPublic] = Field(description="Ordered by detector, then start.")
    next: str | None = Field(description="Cursor to the rest: ask again with the same filters "
                                         "and cursor=<next>; null when this page reaches the "
                                         "end.")
    next_from: str | None = Field(description="With one detector_id: the start of the first "
                                              "row left out (usable as `from`); null otherwise "
                                              "and at the end. Prefer `next`.")


class ConflictPublic(BaseModel):
    id: int
    detector_id: str
    start: str
    stored: int = Field(description="The count kept.")
    offered: int = Field(description="The differing count offered later.")
    received: str = Field(description="When the differing count was offered.")


class ConflictsPage(BaseModel):
    data: list[ConflictPublic]
    next_after: int = Field(description="Ask for conflicts after this id next.")


# ---------------------------------------------------------------------------- alerts


class Acknowledgement(BaseModel):
    model_config = ConfigDict(extra="forbid")
    by: Annotated[str, Field(min_length=1, max_length=100), AfterValidator(plain_text)] = Field(
        description="Who acknowledges (name or desk); no control characters.")
    note: Annotated[str | None, Field(max_length=2000), AfterValidator(prose)] = Field(
        None, description="Free text; may hold tabs and line breaks, no other control characters.")


class AcknowledgementPublic(BaseModel):
    by: str
    at: str
    note: str | None


class AlertPublic(BaseModel):
    id: int
    seq: int = Field(description="Change sequence number: raised on every change of the alert.")
    detector_id: str | None = Field(description="Null for a group alert.")
    group: str | None
    kind: Literal[KINDS]  # type: ignore[valid-type]
    cause: Literal[CAUSES]  # type: ignore[valid-type]
    status: Literal[ALERT_STATUSES]  # type: ignore[valid-type]
    withdrawn: bool
    start: str
    end: str = Field(description="End of the last interval of the episode.")
    closed_at: str | None
    intervals: int
    observed: float | None
    expected: float | None
    p_value: float | None
    score: float | None = Field(description="-log10(p_value).")
    baseline_id: int | None
    summary: str
    detectors: list[str] | None = Field(description="Members, for a group alert.")
    acknowledged: AcknowledgementPublic | None
    suppressed: bool = Field(False, description="Raised while the detector was out of "
                             "service: listed only with suppressed=true.")


class AlertsPage(BaseModel):
    data: list[AlertPublic]
    next_after: int = Field(description="Poll again with after=next_after.")


class HealthWindow(BaseModel):
    model_config = ConfigDict(populate_by_name=True)
    from_: str = Field(alias="from")
    until: str
    intervals: int = Field(description="Intervals the detector should have reported.")
    reported: int
    completeness: float
    flagged_share: float


class OpenAlertRef(BaseModel):
    id: int
    kind: Literal[KINDS]  # type: ignore[valid-type]
    start: str
    subject: str = Field(description="The detector, or 'group:<id>' for a group outage that "
                                     "names it (its own share of that outage is not listed).")
    suppressed: bool = Field(description="Raised while out of service (listed by GET "
                                         "/v1/alerts only with suppressed=true).")


class DetectorFitState(BaseModel):
    state: Literal["learning", "scored"] = Field(
        description="'learning': no baseline yet (the first fit waits for enough history); "
        "'scored': a baseline judges the detector's counts.")
    days_needed: int = Field(description="Days of history still needed before the first fit "
                             "(TALLYWARD_FIRST_FIT_DAYS); 0 once scored or due.")
    history_days: float | None = Field(description="Days from the first stored interval to "
                                       "the clock, while learning.")
    baseline_id: int | None = Field(description="The baseline scoring uses.")
    next_refit: str | None = Field(description="When the next refit (or first fit) is due, "
                                   "on the scoring clock; null before a worker scheduled it.")
    last_fit_status: str | None = Field(description="Outcome of the last scheduled fit.")
    last_fit_reason: str | None = Field(description="Why that fit did not happen, if not.")


class DetectorHealth(BaseModel):
    detector_id: str
    clock: Literal["wall", "data"]
    last_24h: HealthWindow
    last_7d: HealthWindow
    open_alerts: list[OpenAlertRef] = Field(description="Open alerts about the detector, by "
                                            "the ids GET /v1/alerts lists them under.")
    service: ServiceStatePublic
    baseline: DetectorFitState = Field(description="Learning or scored, and the refit schedule.")


# ---------------------------------------------------------------------------- service states


class ServiceChange(BaseModel):
    model_config = ConfigDict(extra="forbid")
    state: Literal[SERVICE_STATES] = Field(  # type: ignore[valid-type]
        description="'in_service', 'out_of_service' (operate or admin) or 'retired' (admin).")
    reason: Annotated[str | None, Field(max_length=500), AfterValidator(prose)] = Field(
        None, description="Why (required for out_of_service and retired): the fault, the work "
                          "order.")
    until: Annotated[str | None, Field(max_length=64), AfterValidator(plain_text)] = Field(
        None, description="out_of_service only: RFC 3339 time (wall clock, in the future) at "
                          "which the detector returns to service by itself.")


class ServicePeriodPublic(BaseModel):
    from_: str = Field(alias="from", description="RFC 3339 UTC start (the scoring clock's time "
                                                 "when it was taken out of service).")
    until: str | None = Field(description="RFC 3339 UTC end; null while it is still out of "
                                          "service.")
    reason: str | None
    by: str | None = Field(description="Name of the API key that took it out of service.")
    closed_by: str | None = Field(description="Name of the key that returned it to service; "
                                              "null when it returned by itself at its until.")
    model_config = ConfigDict(populate_by_name=True)


class ServicePeriodsPublic(BaseModel):
    detector_id: str
    periods: list[ServicePeriodPublic]


# ---------------------------------------------------------------------------- alert history


class HistoryEntry(BaseModel):
    action: Literal[HISTORY_ACTIONS]  # type: ignore[valid-type]
    by: str = Field(description="Who, as named in the request.")
    at: str
    note: str | None
    key: str | None = Field(description="Name of the API key that made the entry.")


class AlertDetail(AlertPublic):
    history: list[HistoryEntry] = Field(description="Acknowledgements, their withdrawals and "
                                                    "notes, oldest first; never changed.")


class AlertNote(BaseModel):
    model_config = ConfigDict(extra="forbid")
    by: Annotated[str, Field(min_length=1, max_length=100), AfterValidator(plain_text)] = Field(
        description="Who writes the note (name or desk); no control characters.")
    note: Annotated[str, Field(min_length=1, max_length=2000), AfterValidator(prose)] = Field(
        description="Free text; may hold tabs and line breaks, no other control characters.")


# ---------------------------------------------------------------------------- corrections


class CorrectionRequest(BaseModel):
    model_config = ConfigDict(extra="forbid")
    detector_id: Annotated[str | None, Field(max_length=64), AfterValidator(plain_text)] = Field(
        None, description="The detector (taken from the conflict when conflict_id is given).")
    start: Annotated[str | None, Field(max_length=64), AfterValidator(plain_text)] = Field(
        None, description="RFC 3339 start of the stored interval (taken from the conflict when "
                          "conflict_id is given).")
    count: int | None = Field(None, ge=0, le=1_000_000, description="The new count, vehicles "
                              "(0..1,000,000); default with conflict_id: the conflict's offered "
                              "value.")
    conflict_id: int | None = Field(None, ge=1, le=INT32_MAX, description="Accept this recorded "
                                    "conflict's offered value (or the count given).")
    reason: Annotated[str, Field(min_length=1, max_length=1000), AfterValidator(prose)] = Field(
        description="Why the stored count is replaced.")


class CorrectionPublic(BaseModel):
    id: int
    detector_id: str
    start: str
    old: int = Field(description="The count stored before the correction.")
    new: int = Field(description="The count stored by the correction.")
    reason: str
    by: str = Field(description="Name of the API key that made the correction.")
    at: str
    conflict_id: int | None


class CorrectionsPage(BaseModel):
    data: list[CorrectionPublic]
    next_after: int = Field(description="Ask for corrections after this id next.")


# ---------------------------------------------------------------------------- planners' figures


class VolumeBucket(BaseModel):
    start: str = Field(description="RFC 3339 start (UTC) of the bucket's first interval.")
    volume: float = Field(description="Observed plus imputed vehicles in the bucket.")
    observed: int = Field(description="Vehicles counted in the bucket's usable intervals.")
    imputed: bool = Field(description="True when any interval of the bucket was imputed.")
    imputed_share: float = Field(description="Share of the bucket's intervals imputed.")
    low: float = Field(description="Lower end of the predictive interval of `volume`.")
    high: float = Field(description="Upper end of the predictive interval of `volume`.")
    intervals: int = Field(description="Scheduled intervals in the bucket (all members).")


class VolumesPage(BaseModel):
    subject: str = Field(description="The detector id, or group:<id>.")
    detectors: list[str]
    step: Literal["15min", "hour", "day"]
    level: float
    imputed_share: float = Field(description="Share of all intervals in the period imputed.")
    data: list[VolumeBucket]


class FigureValue(BaseModel):
    value: int | float | None = Field(description="Vehicles as whole numbers, ratios rounded.")
    low: int | float | None
    high: int | float | None


class PeakHour(BaseModel):
    start: str = Field(description="Local start HH:MM.")
    volume: int = Field(description="Mean vehicles in the hour over the days behind it.")
    phf: float = Field(description="Mean peak-hour factor V / (4 x V15max), HCM.")
    phf_low: float
    phf_high: float
    days: int


class DayTypePeaks(BaseModel):
    am: PeakHour | None
    pm: PeakHour | None


class FiguresReport(BaseModel):
    subject: str
    detectors: list[str]
    year: int
    period: dict[str, str]
    level: float
    aadt: FigureValue = Field(description="AADT, AASHTO method (vehicles/day).")
    adt: FigureValue = Field(description="Plain mean daily volume (vehicles/day).")
    hv30: FigureValue = Field(description="30th highest hourly volume (vehicles/h).")
    k30: FigureValue = Field(description="hv30 / AADT.")
    dhv: FigureValue = Field(description="Design hour volume (vehicles/h).")
    monthly_factors: list[float | None] = Field(description="AADT / monthly ADT, Jan..Dec.")
    day_of_week_factors: list[float | None] = Field(description="AADT / day-of-week ADT, Mon..Sun.")
    days: dict[str, int] = Field(description="Days in the period, complete, with data, imputed.")
    sufficiency: dict[str, Any]
    imputed_share: float = Field(description="Share of the period's intervals imputed.")
    counted_intervals: int
    peak_hours: dict[str, DayTypePeaks] | None = Field(
        description="AM and PM peak hours per day type; null for intervals over 15 minutes.")
    methods: dict[str, str]


class DirectionalReport(BaseModel):
    year: int
    level: float
    d: FigureValue = Field(description="Directional distribution D.")
    peak_direction: str = Field(description="The group carrying the peak direction.")
    method: str
