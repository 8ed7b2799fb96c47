"""Physical plausibility: the largest count a detector's lanes can carry in one interval.

Pure Python. A count above :func:`capacity_cap` is a detector fault whatever the baseline says.
"""

from __future__ import annotations

import math

from service.domain import BASE_CAPACITY_PER_LANE_H

__all__ = ["BASE_CAPACITY_PER_LANE_H", "CAPACITY_MARGIN", "capacity_cap"]

# Highway Capacity Manual base capacities (from memory): basic freeway segment 2,400 pc/h/ln
# (HCM 2000 table, free-flow speed >= 70 mph; HCM 6th ed. c = 2,200 + 10 (FFS - 50) capped at
# 2,400); base saturation flow at a signalized approach 1,900 pc/h/ln. Local roads take the
# signalized figure (their flow is governed by intersections).
# Headroom above the base capacity before a count is called physically implausible: heavy
# vehicles count as more than one passenger car and short intervals see brief surges above a
# 15-minute rate. 1.5 is common practice for a fault cap, not a published figure.
CAPACITY_MARGIN = 1.5


def capacity_cap(road_class: str, *, lanes: int, interval_s: int,
                 per_lane_hourly: float | None = None, margin: float = CAPACITY_MARGIN) -> int:
    """Largest physically plausible count per interval; a count above it is a detector fault.

    Parameters
    ----------
    road_class : {"freeway", "arterial", "local"}
        Road class; arterial means a signalized approach.
    lanes : int
        Lanes the detector counts.
    interval_s : int
        Interval length in seconds.
    per_lane_hourly : float, optional
        Override of the base capacity in vehicles per hour per lane (a detector's own figure).
    margin : float, default 1.5
        Headroom factor over the base capacity (common practice).

    Returns
    -------
    int
        ``ceil(per_lane_hourly * margin * lanes * interval_s / 3600)`` vehicles per interval.
    """
    if per_lane_hourly is None:
        try:
            per_lane_hourly = BASE_CAPACITY_PER_LANE_H[road_class]
        except KeyError:
            raise ValueError(f"unknown road class {road_class!r}; expected one of "
                             f"{sorted(BASE_CAPACITY_PER_LANE_H)}") from None
    if lanes < 1 or interval_s <= 0 or per_lane_hourly <= 0 or margin <= 0:
        raise ValueError("lanes, interval_s, per_lane_hourly and margin must be positive")
    return int(math.ceil(per_lane_hourly * margin * lanes * interval_s / 3600.0 - 1e-9))
