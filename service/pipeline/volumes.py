"""Clean volumes: a detector's (or a group's) stored counts with their quality flags, gaps and
replaced intervals imputed from the baseline, summed to 15 minutes, hours or days.

Reads through ``store`` (counts, flags, the baseline), computes with ``stats.figures``.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

import numpy as np
from sqlalchemy import Engine

from service.errors import NotFound, ValidationFailed
from service.pipeline.baseline_day import current_baseline
from service.stats import figures as fg
from service.stats.calendar import local_time_grid, scheduled_intervals, time_zone
from service.store import quality
from service.store.engine import read_transaction
from service.timefmt import format_utc

STEPS_S = {"15min": 900, "hour": 3600, "day": 86400}
STEP_TEXT = "15min, hour or day"
MAX_VOLUME_DAYS = 400  # longest period the volumes route serves in one answer (days)


@dataclass(frozen=True)
class CleanSeries:
    """One detector's clean intervals over whole local days, and their calendar."""

    detector_id: str
    interval_s: int
    timezone: str
    start_s: np.ndarray  # scheduled interval starts, epoch seconds (UTC)
    flag: np.ndarray  # quality flag per interval (object array of str)
    clean: fg.CleanIntervals
    local_day: np.ndarray  # days since 1970-01-01, per interval
    seconds_of_day: np.ndarray  # local seconds after midnight, per interval
    day_type: np.ndarray  # day-type code per interval
    first_day: int
    n_days: int

    def key(self, step_s: int) -> np.ndarray:
        """Local bucket of each interval: 15-minute period, clock hour or day."""
        per_day = 86400 // step_s
        return self.local_day.astype(np.int64) * per_day + self.seconds_of_day // step_s


def local_midnight(t_s: int, zone: Any, *, after: bool) -> int:
    """The local midnight at or before ``t_s`` (epoch seconds), or at or after it."""
    d = datetime.fromtimestamp(t_s, zone).date()
    midnight = int(datetime(d.year, d.month, d.day, tzinfo=zone).timestamp())
    if after and midnight < t_s:
        d += timedelta(days=1)
        midnight = int(datetime(d.year, d.month, d.day, tzinfo=zone).timestamp())
    return midnight


def clean_series(engine: Engine, detector_id: str, *, from_s: int, until_s: int) -> CleanSeries:
    """Clean intervals of one detector over the local days touching ``[from_s, until_s)``."""
    cur = current_baseline(engine, detector_id)
    det, base = cur.detector, cur.baseline
    zone = time_zone(det.timezone)
    lo = local_midnight(from_s, zone, after=False)
    hi = local_midnight(until_s, zone, after=True)
    with read_transaction(engine) as conn:
        starts, counts = quality.count_arrays(conn, detector_id, from_s=lo, until_s=hi)
        lookup = quality.flag_lookup(conn, detector_id, from_s=lo, until_s=hi)
    sched = scheduled_intervals(lo, hi, interval_s=det.interval_s)
    grid = local_time_grid(sched, interval_s=det.interval_s, timezone=det.timezone,
                           holiday_calendar=det.holiday_calendar)
    count = np.zeros(sched.size, dtype=np.int64)
    present = np.zeros(sched.size, dtype=bool)
    if starts.size:
        pos = np.searchsorted(sched, starts)
        inside = (pos < sched.size)
        inside[inside] = sched[pos[inside]] == starts[inside]
        count[pos[inside]] = counts[inside]
        present[pos[inside]] = True
    flag = np.asarray(lookup.flags(sched), dtype=object)
    flag[~present] = quality.MISSING
    replaced = np.fromiter((quality.replaced_by_imputation(f) for f in flag), dtype=bool,
                           count=flag.size) if lookup.replaces_any else np.zeros(flag.size, bool)
    usable = present & ~replaced
    expected = base.expected_for(grid.day_type, grid.bin)
    first_day = int(grid.local_day[0]) if sched.size else 0
    day = (grid.local_day - first_day).astype(np.intp)
    clean = fg.clean_intervals(count, usable, mu=expected.mu,
                               interval_alpha=expected.interval_alpha,
                               day_alpha=expected.day_alpha, day=day)
    seconds = grid.bin.astype(np.int64) * det.interval_s
    return CleanSeries(detector_id=detector_id, interval_s=det.interval_s,
                       timezone=det.timezone, start_s=sched, flag=flag, clean=clean,
                       local_day=grid.local_day, seconds_of_day=seconds,
                       day_type=grid.day_type, first_day=first_day,
                       n_days=int(day[-1]) + 1 if day.size else 0)


def group_member_ids(engine: Engine, group_id: str) -> list[str]:
    """The group's detectors; ``NotFound`` for a group without members."""
    with read_transaction(engine) as conn:
        members = quality.group_members(conn, group_id)
    if not members:
        raise NotFound(f"group {group_id!r} has no member detectors (or does not exist); "
                       "a group is the `group` field of its detectors", code="empty_group")
    return members


def check_period(from_s: int, until_s: int, *, max_days: int) -> None:
    if until_s <= from_s:
        raise ValidationFailed(f"the period ends ({format_utc(until_s)}) before or when it "
                               f"starts ({format_utc(from_s)}); give from < to")
    if until_s - from_s > max_days * 86400:
        raise ValidationFailed(f"the period is longer than {max_days} days; ask for less")


def step_seconds(step: str) -> int:
    try:
        return STEPS_S[step]
    except KeyError:
        raise ValidationFailed(f"step {step[:20]!r} is not offered; use {STEP_TEXT}",
                               code="unsupported_step") from None


def volumes(engine: Engine, detector_ids: list[str], *, from_s: int, until_s: int, step: str,
            level: float = 0.95) -> dict[str, Any]:
    """Clean volumes per bucket of the sum of ``detector_ids`` over ``[from_s, until_s)``.

    Each bucket: its UTC ``start``, ``volume`` (observed plus imputed vehicles), ``observed``,
    ``imputed`` (True when any interval in it was imputed), ``imputed_share`` of its
    intervals, and a ``level`` interval ``low``..``high`` for the imputed part."""
    check_period(from_s, until_s, max_days=MAX_VOLUME_DAYS)
    step_s = step_seconds(step)
    merged: dict[int, list[float]] = {}
    starts: dict[int, int] = {}
    zones = set()
    for det in detector_ids:
        series = clean_series(engine, det, from_s=from_s, until_s=until_s)
        zones.add(series.timezone)
        if step_s < series.interval_s:
            raise ValidationFailed(f"step {step} is shorter than detector {det!r}'s "
                                   f"{series.interval_s} s interval; use a longer step",
                                   code="unsupported_step")
        inside = (series.start_s >= from_s) & (series.start_s < until_s)
        c = series.clean
        sums = fg.bucket_totals(series.key(step_s)[inside], observed=c.observed[inside],
                                imputed_mean=c.imputed_mean[inside],
                                imputed_var=c.imputed_var[inside], imputed=c.imputed[inside],
                                level_rel_var=c.level_rel_var[inside])
        first_start = series.start_s[inside][sums["first"]]
        for i, key in enumerate(sums["bucket"].tolist()):
            row = merged.setdefault(key, [0.0, 0.0, 0.0, 0, 0])
            row[0] += sums["observed"][i]
            row[1] += sums["imputed_mean"][i]
            row[2] += sums["variance"][i]
            row[3] += int(sums["intervals"][i])
            row[4] += int(sums["imputed_intervals"][i])
            starts[key] = min(starts.get(key, 1 << 62), int(first_start[i]))
    if len(zones) > 1:
        raise ValidationFailed("the group's detectors are in different time zones; local "
                               "buckets need one", code="mixed_time_zones")
    keys = sorted(merged)
    arr = np.asarray([merged[k] for k in keys], dtype=float).reshape(-1, 5)
    low, high = fg.normal_interval(arr[:, 0], arr[:, 1], arr[:, 2], level=level)
    out = []
    for i, k in enumerate(keys):
        n, n_imp = int(arr[i, 3]), int(arr[i, 4])
        out.append({"start": format_utc(starts[k]), "volume": round(arr[i, 0] + arr[i, 1], 1),
                    "observed": int(arr[i, 0]), "imputed": n_imp > 0,
                    "imputed_share": round(n_imp / n, 3) if n else 0.0,
                    "low": round(float(low[i]), 1), "high": round(float(high[i]), 1),
                    "intervals": n})
    total = float(arr[:, 3].sum())
    return {"data": out, "imputed_share": round(float(arr[:, 4].sum()) / total, 3) if total else 0.0}
