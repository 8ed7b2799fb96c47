"""Quality flags of stored counts, derived at read time from what the scorer stored, the
detector's out-of-service periods and the count corrections.

The scorer keeps flagged intervals sparsely (``evidence``) and episodes (``alerts``); a count's
flag is read by joining them with ``service_periods`` and ``count_corrections``, so nothing
needs to write a flag per interval.

Flag values (one per interval), the first that applies wins:

``corrected``
    The stored count replaced an earlier one by an admin correction (``count_corrections``).
    A person has checked the value, so it comes first: the clean volumes use it as observed,
    whatever the scorer or an out-of-service period would say of the interval (the correction
    and its reason are listed by ``GET /v1/counts/corrections``).
``out_of_service``
    The interval starts inside a period the detector was declared out of service
    (``service_periods``: ``from_s`` inclusive, ``to_s`` exclusive, open periods to the end).
``alert:<kind>``
    Inside a (not withdrawn) alert episode of this detector, e.g. ``alert:zero_counts``.
    Episodes whose cause is ``traffic`` say so as ``alert:<kind>:traffic``: the counts are real
    traffic and are kept by the clean volumes.
``<kind>``
    The scorer's evidence flagged this interval alone (no episode), e.g. ``high_volume``.
``ok``
    Scored and not flagged, or not scored yet (the scorer's watermark is not applied here).

``missing`` is the clean volumes' word for an interval with no stored count.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from sqlalchemy import Connection, or_, select

from service.store import tables

OK = "ok"
MISSING = "missing"
OUT_OF_SERVICE = "out_of_service"  # inside a stored out-of-service period
CORRECTED = "corrected"  # replaced by an admin correction
TRAFFIC_CAUSE = "traffic"


@dataclass(frozen=True)
class FlagLookup:
    """Evidence, alert spans, out-of-service periods and corrected starts of one detector over
    a window, for flagging starts."""

    evidence_start_s: np.ndarray  # sorted
    evidence_kind: list[str]
    alert_start_s: np.ndarray  # inclusive
    alert_end_s: np.ndarray  # start of the last interval, inclusive
    alert_flag: list[str]
    service_from_s: np.ndarray = field(default_factory=lambda: np.zeros(0))  # inclusive
    service_to_s: np.ndarray = field(default_factory=lambda: np.zeros(0))  # exclusive (inf: open)
    corrected_start_s: np.ndarray = field(
        default_factory=lambda: np.zeros(0, dtype=np.int64))  # sorted

    @property
    def replaces_any(self) -> bool:
        """Whether any interval of the window may be replaced by the clean volumes."""
        return bool(self.alert_flag) or bool(self.service_from_s.size)

    def flag(self, start_s: int) -> str:
        """The flag of one interval start (for row-at-a-time reads)."""
        cs = self.corrected_start_s
        j = int(np.searchsorted(cs, start_s))
        if j < cs.size and int(cs[j]) == start_s:
            return CORRECTED
        for lo, hi in zip(self.service_from_s.tolist(), self.service_to_s.tolist(), strict=True):
            if lo <= start_s < hi:
                return OUT_OF_SERVICE
        for lo, hi, flag in zip(self.alert_start_s.tolist(), self.alert_end_s.tolist(),
                                self.alert_flag, strict=True):
            if lo <= start_s <= hi:
                return flag
        ev = self.evidence_start_s
        i = int(np.searchsorted(ev, start_s))
        if i < ev.size and int(ev[i]) == start_s:
            return self.evidence_kind[i]
        return OK

    def flags(self, start_s: np.ndarray) -> list[str]:
        """The flag of each interval start (epoch seconds, UTC, sorted); each pass overrides
        the one before, weakest first: evidence, alerts, out of service, corrected."""
        t = np.asarray(start_s, dtype=np.int64)
        out = np.full(t.size, OK, dtype=object)
        if self.evidence_start_s.size:
            i = np.searchsorted(self.evidence_start_s, t)
            hit = i < self.evidence_start_s.size
            hit[hit] = self.evidence_start_s[i[hit]] == t[hit]
            kinds = np.asarray(self.evidence_kind, dtype=object)
            out[hit] = kinds[i[hit]]
        # Alerts are few: one pass each over the sorted starts.
        for lo, hi, flag in zip(self.alert_start_s, self.alert_end_s, self.alert_flag,
                                strict=True):
            a, b = np.searchsorted(t, lo, side="left"), np.searchsorted(t, hi, side="right")
            out[a:b] = flag
        for lo, hi in zip(self.service_from_s, self.service_to_s, strict=True):
            a, b = np.searchsorted(t, lo, side="left"), np.searchsorted(t, hi, side="left")
            out[a:b] = OUT_OF_SERVICE
        if self.corrected_start_s.size:
            j = np.searchsorted(self.corrected_start_s, t)
            hit = j < self.corrected_start_s.size
            hit[hit] = self.corrected_start_s[j[hit]] == t[hit]
            out[hit] = CORRECTED
        return out.tolist()


def flag_lookup(conn: Connection, detector_id: str, *, from_s: int, until_s: int) -> FlagLookup:
    """Evidence, alerts, out-of-service periods and corrected starts of one detector touching
    ``[from_s, until_s)``."""
    e, a = tables.evidence, tables.alerts
    ev = conn.execute(select(e.c.start_s, e.c.kind, e.c.log_p)
                      .where(e.c.detector_id == detector_id, e.c.start_s >= from_s,
                             e.c.start_s < until_s)
                      .order_by(e.c.start_s, e.c.log_p)).all()
    starts: list[int] = []
    kinds: list[str] = []
    for start_s, kind, _ in ev:  # the most significant kind of an interval comes first
        if not starts or starts[-1] != start_s:
            starts.append(int(start_s))
            kinds.append(kind)
    al = conn.execute(select(a.c.start_s, a.c.end_s, a.c.kind, a.c.cause)
                      .where(a.c.detector_id == detector_id, a.c.withdrawn == 0,
                             a.c.start_s < until_s, a.c.end_s >= from_s)
                      .order_by(a.c.start_s)).all()
    p, k, d = tables.service_periods, tables.count_corrections, tables.detectors
    periods = conn.execute(select(p.c.from_s, p.c.to_s, d.c.service_since_s,
                                  d.c.service_until_s)
                           .join(d, d.c.detector_id == p.c.detector_id)
                           .where(p.c.detector_id == detector_id, p.c.from_s < until_s,
                                  or_(p.c.to_s.is_(None), p.c.to_s > from_s))
                           .order_by(p.c.from_s)).all()
    corrected = conn.execute(select(k.c.start_s).distinct()
                             .where(k.c.detector_id == detector_id, k.c.start_s >= from_s,
                                    k.c.start_s < until_s)
                             .order_by(k.c.start_s)).scalars().all()
    return FlagLookup(
        service_from_s=np.asarray([r.from_s for r in periods], dtype=float),
        service_to_s=np.asarray([_period_end(r) for r in periods], dtype=float),
        corrected_start_s=np.asarray(corrected, dtype=np.int64),
        evidence_start_s=np.asarray(starts, dtype=np.int64), evidence_kind=kinds,
        alert_start_s=np.asarray([r.start_s for r in al], dtype=np.int64),
        alert_end_s=np.asarray([r.end_s for r in al], dtype=np.int64),
        alert_flag=[f"alert:{r.kind}" + (f":{TRAFFIC_CAUSE}" if r.cause == TRAFFIC_CAUSE else "")
                    for r in al])


def _period_end(row: Any) -> float:
    """Where a period ends: its ``to_s``; an open one with an ``until`` ends as long after its
    start as the declared wall-clock period (as the sweep will close it), else never."""
    if row.to_s is not None:
        return float(row.to_s)
    if row.service_until_s is not None and row.service_since_s is not None:
        return float(row.from_s) + max(float(row.service_until_s - row.service_since_s), 0.0)
    return float(np.inf)


def replaced_by_imputation(flag: str) -> bool:
    """Whether clean volumes replace a count with this flag: detector or communications
    episodes and out-of-service periods are replaced; lone evidence, traffic episodes and
    corrected counts (the corrected value, as observed) are kept (marked)."""
    if flag == OUT_OF_SERVICE:
        return True
    return flag.startswith("alert:") and not flag.endswith(":" + TRAFFIC_CAUSE)


def count_arrays(conn: Connection, detector_id: str, *, from_s: int, until_s: int
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Stored starts (epoch seconds) and counts of one detector in ``[from_s, until_s)``."""
    c = tables.counts
    result = conn.execute(select(c.c.start_s, c.c.count)
                          .where(c.c.detector_id == detector_id, c.c.start_s >= from_s,
                                 c.c.start_s < until_s).order_by(c.c.start_s))
    # fromiter over the flattened rows: np.asarray of a list of row tuples is ~20x slower
    flat = np.fromiter((v for row in result for v in row), dtype=np.int64)
    return flat[0::2].copy(), flat[1::2].copy()


def group_members(conn: Connection, group_id: str) -> list[str]:
    """Detector ids of a group, in id order."""
    d = tables.detectors
    return list(conn.execute(select(d.c.detector_id).where(d.c.group_id == group_id)
                             .order_by(d.c.detector_id)).scalars())
