"""What a detector should count: its current baseline served for a local date or a day type,
and the planners' figures. Reads through ``store``, computes with ``stats``."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import orjson
from sqlalchemy import Engine, select

from service.domain import DAY_TYPES
from service.errors import NotFound
from service.stats import baseline as bl
from service.stats.calendar import local_time_grid
from service.stats.intervals import predictive_interval
from service.store import tables
from service.store.baselines import load_baseline
from service.store.engine import read_transaction
from service.timefmt import format_utc


@dataclass(frozen=True)
class Current:
    """A detector's row, its latest baseline's row and that baseline."""

    detector: Any
    row: Any
    baseline: bl.Baseline


def current_baseline(engine: Engine, detector_id: str) -> Current:
    """The detector's latest baseline; ``NotFound`` (``no_baseline``) when none is fitted."""
    d, b = tables.detectors, tables.baselines
    with read_transaction(engine) as conn:
        det = conn.execute(select(d).where(d.c.detector_id == detector_id)).first()
        if det is None:
            raise NotFound(f"unknown detector {detector_id!r}")
        row = conn.execute(select(b.c.baseline_id, b.c.fitted_s, b.c.as_of_s, b.c.window_start_s,
                                  b.c.window_end_s, b.c.summary)
                           .where(b.c.detector_id == detector_id)
                           .order_by(b.c.baseline_id.desc()).limit(1)).first()
        if row is None:
            raise NotFound(f"detector {detector_id!r} has no baseline yet; fit one with "
                           "POST /v1/baselines/fit or `tallyward fit`", code="no_baseline")
        base = load_baseline(conn, row.baseline_id)
    return Current(det, row, base)


@dataclass(frozen=True)
class DayGrid:
    """The intervals of one local day: labels, day-type codes and time-of-day bins."""

    labels: list[str]  # RFC 3339 local starts for a date; HH:MM for a day type
    day_type_code: np.ndarray  # indexes into DAY_TYPES
    bin: np.ndarray  # local time-of-day bin (local seconds since midnight // interval_s)
    day_type: str


def local_day_grid(day: date, *, interval_s: int, timezone: str,
                   holiday_calendar: str | None) -> DayGrid:
    """Every interval of the local date ``day`` at a detector (23 or 25 hours on DST days)."""
    zone = ZoneInfo(timezone)
    lo = int(datetime(day.year, day.month, day.day, tzinfo=zone).timestamp())
    nxt = day + timedelta(days=1)
    hi = int(datetime(nxt.year, nxt.month, nxt.day, tzinfo=zone).timestamp())
    starts = np.arange(lo, hi, interval_s, dtype=np.int64)
    grid = local_time_grid(starts, interval_s=interval_s, timezone=timezone,
                              holiday_calendar=holiday_calendar)
    labels = [datetime.fromtimestamp(int(t), zone).isoformat() for t in starts]
    return DayGrid(labels, grid.day_type, grid.bin, DAY_TYPES[int(grid.day_type[0])])


def day_type_grid(day_type: str, *, interval_s: int, bins_per_day: int) -> DayGrid:
    """A generic day of ``day_type``: one interval per bin, labeled by local HH:MM."""
    bins = np.arange(bins_per_day)
    codes = np.full(bins.size, DAY_TYPES.index(day_type))
    labels = [f"{int(b) * interval_s // 3600:02d}:{int(b) * interval_s % 3600 // 60:02d}"
              for b in bins]
    return DayGrid(labels, codes, bins, day_type)


def _model(row: Any, base: bl.Baseline, day_type: str) -> dict[str, Any]:
    prof = base.profiles[day_type]
    return {
        "baseline_id": row.baseline_id, "fitted_at": format_utc(row.fitted_s),
        "window": {"start": format_utc(row.window_start_s), "end": format_utc(row.window_end_s)},
        "day_type": day_type, "fitted_from": prof.fitted_from,
        "fallback": prof.fitted_from != day_type,
        "distribution": prof.distribution, "day_alpha": prof.day_alpha,
        "interval_alpha": prof.interval_alpha, "dispersion_p_value": prof.dispersion_p_value,
        "days_used": prof.days_used,
    }


def validity_warning(day: date, *, window_start_s: int, window_end_s: int, timezone: str,
                     validity_days: int) -> str | None:
    """A warning when the local ``day`` lies more than ``validity_days`` outside the fit
    window (traffic drifts with the season: the baseline says less the further away)."""
    zone = ZoneInfo(timezone)
    first = datetime.fromtimestamp(window_start_s, zone).date()
    last = datetime.fromtimestamp(window_end_s - 1, zone).date()
    if day > last + timedelta(days=validity_days):
        gap = (day - last).days
        where = "after"
    elif day < first - timedelta(days=validity_days):
        gap = (first - day).days
        where = "before"
    else:
        return None
    return (f"{day.isoformat()} is {gap} days {where} the baseline's fit window "
            f"({first.isoformat()}..{last.isoformat()}), more than the {validity_days} days it "
            "is served for without warning: seasonal change is not in the baseline")


def baseline_day(engine: Engine, detector_id: str, *, day: date | None, day_type: str | None,
                 level: float, validity_days: int = 28) -> dict[str, Any]:
    """Expected count and central predictive interval (``level``) for every interval of a
    local date, or of a generic day of ``day_type`` (exactly one of the two is given); a date
    far outside the fit window carries a ``warning``."""
    cur = current_baseline(engine, detector_id)
    det, base = cur.detector, cur.baseline
    if day is not None:
        # base.interval_s: short-interval detectors are modeled on window sums
        grid = local_day_grid(day, interval_s=base.interval_s, timezone=det.timezone,
                              holiday_calendar=det.holiday_calendar)
    else:
        assert day_type is not None
        grid = day_type_grid(day_type, interval_s=base.interval_s,
                             bins_per_day=base.bins_per_day)
    mu, log_se, day_alpha, interval_alpha = base.expected_for(grid.day_type_code, grid.bin)
    low, high = predictive_interval(mu, log_se, day_alpha, interval_alpha, level=level)
    warning = None if day is None else validity_warning(
        day, window_start_s=int(cur.row.window_start_s), window_end_s=int(cur.row.window_end_s),
        timezone=det.timezone, validity_days=validity_days)
    data = [{"start": lab, "expected": round(float(m), 3), "low": int(lo_), "high": int(hi_)}
            for lab, m, lo_, hi_ in zip(grid.labels, mu, low, high, strict=True)]
    return {"detector_id": detector_id, "date": None if day is None else day.isoformat(),
            "day_type": grid.day_type, "level": level, "interval_s": base.interval_s,
            "model": _model(cur.row, base, grid.day_type),
            "expected_total": round(float(np.sum(mu))), "warning": warning, "data": data}


def profile(engine: Engine, detector_id: str) -> dict[str, Any]:
    """What the current baseline expects per day type: daily volume, hourly volumes and the
    busiest expected hour with its share of the expected day (not K30: see the figures)."""
    cur = current_baseline(engine, detector_id)
    summary = bl.daily_profile_summary(cur.baseline, lanes=cur.detector.lanes)
    return {"detector_id": detector_id, "lanes": cur.detector.lanes,
            "baseline_id": cur.row.baseline_id, "fitted_at": format_utc(cur.row.fitted_s),
            "fit": orjson.loads(cur.row.summary), "day_types": summary}
