"""What a detector is, as the registry stores it: the validated record of a registration or of
one GeoJSON feature (pydantic; the web layer publishes these models, the store writes them)."""

from __future__ import annotations

from typing import Any, Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from service.domain import (
    INTERVAL_RULE_TEXT,
    ROAD_CLASSES,
    control_character_error,
    interval_error,
)
from service.stats.calendar import parse_holiday_calendar


class GeoPoint(BaseModel):
    """A GeoJSON Point (RFC 7946): coordinates are [longitude, latitude] in WGS 84."""

    model_config = ConfigDict(extra="forbid")
    type: Literal["Point"]
    coordinates: list[float] = Field(min_length=2, max_length=3)

    @field_validator("coordinates", mode="before")
    @classmethod
    def _numbers_only(cls, value: Any) -> Any:
        if isinstance(value, list) and any(isinstance(v, bool) or not isinstance(v, int | float)
                                           for v in value):
            raise ValueError("coordinates are numbers: [longitude, latitude]")
        return value

    @field_validator("coordinates")
    @classmethod
    def _in_range(cls, value: list[float]) -> list[float]:
        lon, lat = value[0], value[1]
        if not -180 <= lon <= 180 or not -90 <= lat <= 90:
            raise ValueError("coordinates are [longitude -180..180, latitude -90..90]")
        return value


class DetectorCreate(BaseModel):
    model_config = ConfigDict(extra="forbid", populate_by_name=True)

    interval_s: int = Field(description=f"Reporting interval in seconds: {INTERVAL_RULE_TEXT}.")
    lanes: int = Field(1, ge=1, le=16, description="Lanes the detector covers.")
    timezone: str = Field(description="IANA time zone of the site, e.g. America/Chicago.")
    group: str | None = Field(None, max_length=64, description="Site, approach or corridor segment.")
    label: str | None = Field(None, max_length=200)
    road_class: Literal[ROAD_CLASSES] = "arterial"  # type: ignore[valid-type]
    holiday_calendar: str | None = Field(
        None, max_length=16, description="Country[-subdivision] code for the holidays library, e.g. US or US-CO."
    )
    location: GeoPoint | None = None
    capacity_per_lane_h: float | None = Field(
        None, gt=0, le=10_000, description="Override of the per-lane hourly capacity cap (veh/h/lane)."
    )

    @field_validator("timezone", "group", "label", "holiday_calendar", mode="before")
    @classmethod
    def _printable(cls, value: Any) -> Any:
        if isinstance(value, str):
            problem = control_character_error(value)
            if problem:
                raise ValueError(problem)
        return value

    @field_validator("interval_s")
    @classmethod
    def _interval(cls, value: int) -> int:
        problem = interval_error(value)
        if problem:
            raise ValueError(problem)
        return value

    @field_validator("timezone")
    @classmethod
    def _zone(cls, value: str) -> str:
        try:
            ZoneInfo(value)
        except (ZoneInfoNotFoundError, ValueError):
            raise ValueError(f"{value!r} is not an IANA time zone name such as America/Chicago") from None
        return value

    @field_validator("holiday_calendar")
    @classmethod
    def _calendar(cls, value: str | None) -> str | None:
        if value is None or value == "":
            return None
        parse_holiday_calendar(value)  # ValueError saying what is accepted
        return value



class FeatureIn(BaseModel):
    model_config = ConfigDict(extra="allow")
    type: Literal["Feature"]
    id: str | int | None = None
    geometry: dict[str, Any] | None = None
    properties: dict[str, Any]

    @model_validator(mode="after")
    def _has_id(self) -> FeatureIn:
        if self.id is None and "detector_id" not in self.properties:
            raise ValueError("a Feature needs an id or a detector_id property")
        return self
