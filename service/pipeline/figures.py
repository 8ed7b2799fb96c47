"""Planners' figures of a detector or a group for a year: AADT (AASHTO) and ADT, monthly and
day-of-week factors, the 30th highest hour, K30, DHV, AM/PM peak hours with their peak-hour
factors, and D for a pair of opposite directions; each with its uncertainty and days behind it.

Reads clean volumes (:mod:`service.pipeline.volumes`), computes with ``stats.figures``.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any

import numpy as np
from sqlalchemy import Engine, select

from service.domain import DAY_TYPES
from service.errors import NotFound, ValidationFailed
from service.pipeline.volumes import clean_series
from service.stats import figures as fg
from service.stats.calendar import time_zone
from service.store import tables
from service.store.engine import read_transaction
from service.timefmt import format_utc

FIRST_YEAR, LAST_YEAR = 1990, 2100
DRAWS = 200  # joint draws of the imputed part behind each interval
METHODS = {
    "aadt": "AASHTO method as adopted by the FHWA Traffic Monitoring Guide (2016 edition, ch. 3): "
            "mean of the 12 monthly means of the 7 monthly day-of-week means of daily volume "
            "(formula from memory, edition to be confirmed)",
    "sufficiency": "at least one complete (all 24 hours counted, nothing imputed) day in each "
                   "of the 84 month/day-of-week cells (rule from memory of the Guide and the "
                   "AASHTO Guidelines for Traffic Data Programs); figures are still given when "
                   "it is not met, from imputed days, with meets_rule false",
    "adt": "plain mean of the period's daily volumes",
    "hv30": "30th highest clock-hour volume of the year (common practice, US design)",
    "k30": "hv30 / AADT",
    "dhv": "design hour volume = K30 x AADT = hv30 for the year itself",
    "phf": "Highway Capacity Manual: V / (4 x V15max) from observed 15-minute volumes only; "
           "mean over the day type's days, bootstrap interval over days",
    "d": "peak direction's share of two-way volume over the 30 highest two-way hours",
    "intervals": "central intervals from joint draws of the imputed part (gamma day levels, "
                 "negative binomial intervals); observed counts are taken as exact",
}


def check_year(year: int) -> int:
    if not FIRST_YEAR <= year <= LAST_YEAR:
        raise ValidationFailed(f"year {year} is outside {FIRST_YEAR}..{LAST_YEAR}")
    return year


@dataclass(frozen=True)
class YearClean:
    """One detector's clean year: hourly volumes for the figures, quarters for the PHF."""

    detector_id: str
    hourly: fg.HourlyClean
    quarters: np.ndarray | None  # (n_days, 96) observed 15-minute volumes, None if interval > 15 min
    day_type: np.ndarray  # code per day
    from_s: int
    until_s: int
    counted: int  # intervals with a stored count


def year_clean(engine: Engine, detector_id: str, year: int) -> YearClean:
    """The detector's clean volumes over its local calendar year."""
    d = tables.detectors
    with read_transaction(engine) as conn:
        tz = conn.execute(select(d.c.timezone).where(d.c.detector_id == detector_id)).scalar()
    if tz is None:
        raise NotFound(f"unknown detector {detector_id!r}")
    zone = time_zone(tz)
    lo = int(datetime(year, 1, 1, tzinfo=zone).timestamp())
    hi = int(datetime(year + 1, 1, 1, tzinfo=zone).timestamp())
    s = clean_series(engine, detector_id, from_s=lo, until_s=hi)
    counted = int((s.flag != "missing").sum())
    if counted == 0:
        raise ValidationFailed(f"detector {detector_id!r} has no counts in {year}; figures "
                               "need counted data in the year", code="no_counted_days")
    first = np.searchsorted(s.clean.day, np.arange(s.n_days))
    days = s.first_day + np.arange(s.n_days)
    month, dow = fg.calendar_of_days(days)
    hourly = fg.hourly_clean(s.clean, hour_key=s.key(3600), month=month, day_of_week=dow)
    quarters = None
    if 900 % s.interval_s == 0:
        quarters = fg.quarter_table(s.clean, quarter_of_day=s.seconds_of_day // 900,
                                    per_quarter=900 // s.interval_s)
    return YearClean(detector_id, hourly, quarters, s.day_type[first], lo, hi, counted)


def _round(fig: dict[str, Any] | None, digits: int) -> dict[str, Any] | None:
    if fig is None:
        return None
    return {k: (None if v is None else round(v, digits) if digits else int(round(v)))
            if k in ("value", "low", "high") else v for k, v in fig.items()}


def _factors(values: list[float | None]) -> list[float | None]:
    return [None if v is None else round(v, 3) for v in values]


def figures(engine: Engine, detector_ids: list[str], *, year: int, level: float = 0.95,
            subject: str | None = None) -> dict[str, Any]:
    """The year's figures of one detector, or of the sum of a group's detectors."""
    check_year(year)
    members = [year_clean(engine, d, year) for d in detector_ids]
    try:
        annual = fg.annual_figures([m.hourly for m in members], level=level, draws=DRAWS)
    except ValueError as exc:
        raise ValidationFailed(f"figures for {year}: {exc}", code="no_counted_days") from None
    peaks = None
    if all(m.quarters is not None for m in members):
        quarters = np.sum([m.quarters for m in members], axis=0)  # NaN where any is unobserved
        peaks = fg.peak_hours(quarters, day_type=members[0].day_type, day_types=DAY_TYPES,
                              level=level)
        for entry in peaks.values():
            for part in ("am", "pm"):
                p = entry[part]
                if p is not None:
                    entry[part] = {**p, "volume": int(round(p["volume"])),
                                   **{k: round(p[k], 2) for k in ("phf", "phf_low", "phf_high")}}
    return {
        "subject": subject or detector_ids[0], "detectors": detector_ids, "year": year,
        "period": {"from": format_utc(members[0].from_s), "until": format_utc(members[0].until_s)},
        "level": level,
        "aadt": _round(annual["aadt"], 0), "adt": _round(annual["adt"], 0),
        "hv30": _round(annual["hv30"], 0), "k30": _round(annual["k30"], 3),
        "dhv": _round(annual["dhv"], 0),
        "monthly_factors": _factors(annual["monthly_factors"]),
        "day_of_week_factors": _factors(annual["day_of_week_factors"]),
        "days": annual["days"],
        "sufficiency": {**annual["sufficiency"], "aadt_from_complete_days_only": (
            None if annual["sufficiency"]["aadt_from_complete_days_only"] is None
            else int(round(annual["sufficiency"]["aadt_from_complete_days_only"])))},
        "imputed_share": round(annual["imputed_share"], 3),
        "counted_intervals": sum(m.counted for m in members),
        "peak_hours": peaks,
        "methods": METHODS,
    }


def directional(engine: Engine, a_ids: list[str], b_ids: list[str], *, year: int,
                level: float = 0.95) -> dict[str, Any]:
    """D of two opposite-direction sets of detectors over the year."""
    check_year(year)
    a = [year_clean(engine, d, year).hourly for d in a_ids]
    b = [year_clean(engine, d, year).hourly for d in b_ids]
    try:
        res = fg.directional_figures(a, b, level=level, draws=DRAWS)
    except ValueError as exc:
        raise ValidationFailed(f"directional distribution for {year}: {exc}") from None
    return {"year": year, "level": level, "d": _round(res["d"], 3),
            "peak_direction": res["peak_direction"], "method": METHODS["d"]}


# ---------------------------------------------------------------------------- many detectors

_worker_engine: Engine | None = None


def _init_worker(settings_json: str) -> None:
    global _worker_engine
    from threadpoolctl import threadpool_limits

    from service.config import Settings
    from service.store.engine import make_worker_engine

    threadpool_limits(1)  # one BLAS thread per worker process
    _worker_engine = make_worker_engine(Settings.model_validate_json(settings_json))


def figures_or_error(engine: Engine, detector_id: str, *, year: int) -> dict[str, Any]:
    """The figures of one detector, or ``{"detector_id", "error"}`` saying why there are none."""
    from service.errors import TallywardError

    try:
        return figures(engine, [detector_id], year=year)
    except TallywardError as exc:
        return {"subject": detector_id, "error": exc.message}


def _chunk(detector_ids: list[str], year: int) -> list[dict[str, Any]]:
    assert _worker_engine is not None
    return [figures_or_error(_worker_engine, d, year=year) for d in detector_ids]


def figures_many(settings: Any, engine: Engine, detector_ids: list[str], *, year: int,
                 workers: int = 1, progress: Any = None) -> list[dict[str, Any]]:
    """Figures of many detectors over ``workers`` processes, in detector order; a detector
    without figures (no baseline, no counts that year) carries an ``error`` instead."""
    from concurrent.futures import ProcessPoolExecutor, as_completed

    check_year(year)
    out: list[dict[str, Any]] = []
    if workers <= 1 or len(detector_ids) < 4:
        for det in detector_ids:
            out.append(figures_or_error(engine, det, year=year))
            if progress:
                progress(1)
    else:
        size = max(1, min(20, len(detector_ids) // (workers * 4) or 1))
        chunks = [detector_ids[i:i + size] for i in range(0, len(detector_ids), size)]
        with ProcessPoolExecutor(max_workers=workers, initializer=_init_worker,
                                 initargs=(settings.model_dump_json(),)) as pool:
            for fut in as_completed([pool.submit(_chunk, c, year) for c in chunks]):
                part = fut.result()
                out.extend(part)
                if progress:
                    progress(len(part))
    order = {d: i for i, d in enumerate(detector_ids)}
    out.sort(key=lambda r: order[r["subject"]])
    return out


REPORT_COLUMNS = ("detector_id", "year", "aadt", "aadt_low", "aadt_high", "adt", "hv30",
                  "k30", "k30_low", "k30_high", "imputed_share", "days_complete",
                  "days_with_data", "meets_rule", "am_peak", "am_phf", "pm_peak", "pm_phf",
                  "error")


def report_row(fig: dict[str, Any]) -> dict[str, Any]:
    """One flat CSV row of a detector's figures (weekday peaks)."""
    if "error" in fig:
        return {"detector_id": fig["subject"], "error": fig["error"]}
    wk = (fig.get("peak_hours") or {}).get("weekday") or {}
    am, pm = wk.get("am") or {}, wk.get("pm") or {}
    return {"detector_id": fig["subject"], "year": fig["year"],
            "aadt": fig["aadt"]["value"], "aadt_low": fig["aadt"]["low"],
            "aadt_high": fig["aadt"]["high"], "adt": fig["adt"]["value"],
            "hv30": fig["hv30"]["value"], "k30": fig["k30"]["value"],
            "k30_low": fig["k30"]["low"], "k30_high": fig["k30"]["high"],
            "imputed_share": fig["imputed_share"], "days_complete": fig["days"]["complete"],
            "days_with_data": fig["days"]["with_data"],
            "meets_rule": fig["sufficiency"]["meets_rule"], "am_peak": am.get("start"),
            "am_phf": am.get("phf"), "pm_peak": pm.get("start"), "pm_phf": pm.get("phf"),
            "error": None}
