"""Quality flags of stored counts, derived at read time from what the scorer stored.

The scorer keeps flagged intervals sparsely (``evidence``) and episodes (``alerts``); a count's
flag is read by joining them, so the scorer need not write a flag per interval.

Flag values, most serious first (one per interval):

``out_of_service``
    Reserved: the interval lies in a period the detector was declared out of service
    (:data:`OUT_OF_SERVICE`; filled when such periods are stored).
``corrected``
    Reserved: the stored count replaced an earlier one by correction (:data:`CORRECTED`).
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

from dataclasses import dataclass

import numpy as np
from sqlalchemy import Connection, select

from service.store import tables

OK = "ok"
MISSING = "missing"
OUT_OF_SERVICE = "out_of_service"  # hook: periods declared out of service (not stored yet)
CORRECTED = "corrected"  # hook: counts replaced by a correction (not stored yet)
TRAFFIC_CAUSE = "traffic"


@dataclass(frozen=True)
class FlagLookup:
    """Evidence and alert spans of one detector over a window, for flagging starts."""

    evidence_start_s: np.ndarray  # sorted
    evidence_kind: list[str]
    alert_start_s: np.ndarray  # inclusive
    alert_end_s: np.ndarray  # start of the last interval, inclusive
    alert_flag: list[str]

    def flag(self, start_s: int) -> str:
        """The flag of one interval start (for row-at-a-time reads)."""
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
        """The flag of each interval start (epoch seconds, UTC)."""
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
        return out.tolist()


def flag_lookup(conn: Connection, detector_id: str, *, from_s: int, until_s: int) -> FlagLookup:
    """Evidence and alerts of one detector touching ``[from_s, until_s)``."""
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
    return FlagLookup(
        evidence_start_s=np.asarray(starts, dtype=np.int64), evidence_kind=kinds,
        alert_start_s=np.asarray([r.start_s for r in al], dtype=np.int64),
        alert_end_s=np.asarray([r.end_s for r in al], dtype=np.int64),
        alert_flag=[f"alert:{r.kind}" + (f":{TRAFFIC_CAUSE}" if r.cause == TRAFFIC_CAUSE else "")
                    for r in al])


def replaced_by_imputation(flag: str) -> bool:
    """Whether clean volumes replace a count with this flag: detector or communications
    episodes and out-of-service periods are replaced; lone evidence, traffic episodes and
    corrected counts are kept (marked)."""
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
