"""Alerts from evidence: rebuild a detector's episodes and reconcile them with stored alerts,
then refresh its group's causes and communications alerts.

Runs inside the scoring pass's write transaction (``service.pipeline.score.write_scored``).
Episodes are matched to stored alerts by (subject, kind, start). That key is unique over *all*
stored alerts, withdrawn ones included, and the lookup reads withdrawn ones too: when later data
supports a withdrawn alert again, the same row comes back (same ``id``, ``withdrawn`` false, a
new ``seq`` so pollers see it), never a second row.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import orjson
from sqlalchemy import Connection

from service.stats.episodes import (
    NO_REPORTS_REOPEN_S,
    SHIFT_JOIN_S,
    Episode,
    GroupRun,
    SharedShift,
    cause_for,
    communications_runs,
    episodes_from_rows,
    shared_shifts,
    summary_sentence,
)
from service.store import scoring as store
from service.store.scoring import AlertWriter, DetectorInfo

NOT_SUPPORTED = "Withdrawn: later data no longer supports this alert."
NOT_TOGETHER = "Withdrawn: later data shows the group was not offline together."
NOT_SHARED = "Withdrawn: later data shows most of the group did not deviate together."


def reconcile_detector(conn: Connection, writer: AlertWriter, info: DetectorInfo, *,
                       baseline_id: int, keep_from_s: int, end_s: int, close_after: int
                       ) -> tuple[int, int]:
    """Rebuild the detector's episodes from its evidence and write what changed; the span
    [lo, end_s) rebuilt (it starts earlier than ``keep_from_s`` when an episode reaches in)."""
    step = info.interval_s
    gap = max(close_after + 1, NO_REPORTS_REOPEN_S // step + 1) * step
    lo = keep_from_s
    while (earlier := store.earliest_linked_alert(conn, info.detector_id, lo, gap_s=gap)) \
            is not None:
        lo = int(earlier)
    rows = store.evidence_rows(conn, [info.detector_id], lo, end_s)
    episodes = episodes_from_rows(info.detector_id, rows, interval_s=step,
                                  scored_end_s=end_s, close_after=close_after)
    # Withdrawn alerts too: an episode that later data supports again revives its row.
    stored = {(r.kind, r.start_s): r for r in store.alerts_from(conn, info.detector_id, lo)}
    for ep in episodes:
        writer.upsert(stored.pop((ep.kind, ep.start_s), None),
                      _episode_values(ep, info, baseline_id, "unknown"))
    for old in stored.values():
        if not old.withdrawn:
            writer.withdraw(old, NOT_SUPPORTED)
    return lo, end_s


def _episode_values(ep: Episode, info: DetectorInfo, baseline_id: int, cause: str
                    ) -> dict[str, Any]:
    return {
        "subject": ep.subject, "detector_id": ep.detector_id, "group_id": info.group,
        "kind": ep.kind, "cause": cause, "status": ep.status, "start_s": ep.start_s,
        "end_s": ep.end_s, "closed_s": ep.closed_s, "observed": ep.observed,
        "expected": ep.expected, "log_p": ep.log_p, "n_intervals": ep.n_intervals,
        "baseline_id": baseline_id, "detectors": None, "part_of": None,
        "summary": summary_sentence(ep, cause, interval_s=info.interval_s,
                                    timezone=info.timezone, label=info.label, group=info.group),
    }


def refresh_group(conn: Connection, writer: AlertWriter, group: str, lo: int, hi: int, *,
                  close_after: int) -> None:
    """Causes of the group's alerts near [lo, hi), and its communications alerts."""
    members = store.group_members(conn, group)
    infos = store.load_infos(conn, members)
    step = min(i.interval_s for i in infos.values())
    pad = (close_after + 2) * step
    earlier = store.earliest_alert_ending_after(conn, f"group:{group}", lo - pad)
    lo = min(lo, int(earlier)) if earlier is not None else lo
    group_ids = _write_communications_alerts(conn, writer, group, members, infos, lo - pad, hi,
                                             step=step)
    shift_ids = _write_shift_alerts(conn, writer, group, members, infos, lo - pad, hi,
                                    step=step)
    for row in store.group_detector_alerts(conn, group, lo - pad, hi + pad):
        _refresh_detector_alert(conn, writer, row, infos[row.detector_id], members=members,
                                group=group, group_ids=group_ids, shift_ids=shift_ids)


def _write_shift_alerts(conn: Connection, writer: AlertWriter, group: str,
                        members: Sequence[str], infos: dict[str, DetectorInfo], lo: int,
                        hi: int, *, step: int) -> list[tuple[SharedShift, int]]:
    """The group's traffic alerts: one per shift most of its members show together (see
    ``shared_shifts``), over member alerts ending at ``lo`` or later; each with its alert id.

    The window reaches back until no shift starts before it, so a shift is always rebuilt
    from all its member alerts (its key, the start, never depends on where a pass began)."""
    subject = f"group:{group}"
    timezone = next(iter(infos.values())).timezone
    pad = 2 * SHIFT_JOIN_S
    while True:
        rows = store.group_detector_alerts(conn, group, lo, hi + pad)
        shifts = shared_shifts(rows, n_members=len(members), step=step,
                               day_bounds=lambda t: local_day_bounds(t, timezone))
        first = min((min(sh.start_s, sh.day_lo_s) for sh in shifts), default=lo)
        if first >= lo:
            break
        lo = first - SHIFT_JOIN_S
    stored = {(r.kind, r.start_s): r for kind in ("low_volume", "high_volume")
              for r in store.alerts_from(conn, subject, lo, kind=kind)}
    out: list[tuple[SharedShift, int]] = []
    for sh in shifts:
        values = _shift_values(sh, rows, group, step=step, hi=hi, timezone=timezone)
        out.append((sh, writer.upsert(stored.pop((sh.direction, sh.start_s), None), values)))
    for old in stored.values():
        if not old.withdrawn:
            writer.withdraw(old, NOT_SHARED)
    return out


def local_day_bounds(t: int, timezone: str) -> tuple[int, int]:
    """The local day ``[midnight, next midnight)`` containing ``t`` (epoch seconds)."""
    zone = ZoneInfo(timezone)
    day = datetime.fromtimestamp(t, zone).date()
    nxt = day + timedelta(days=1)
    return (int(datetime(day.year, day.month, day.day, tzinfo=zone).timestamp()),
            int(datetime(nxt.year, nxt.month, nxt.day, tzinfo=zone).timestamp()))


def _shift_values(sh: SharedShift, rows: Sequence[Any], group: str, *, step: int, hi: int,
                  timezone: str) -> dict[str, Any]:
    subject = f"group:{group}"
    part = [r for r in rows if sh.covers(r)]
    closed = all(r.closed_s is not None for r in part)
    observed = sum(r.observed or 0.0 for r in part)
    expected = float(sum(r.expected or 0.0 for r in part))
    log_p = float(min((r.log_p for r in part if r.log_p is not None), default=0.0))
    ep = Episode(subject=subject, detector_id=None, kind=sh.direction, start_s=sh.start_s,
                 end_s=sh.end_s, closed_s=max(r.closed_s for r in part) if closed else None,
                 n_intervals=(sh.end_s - sh.start_s) // step + 1, observed=observed,
                 expected=expected, log_p=log_p)
    return {
        "subject": subject, "detector_id": None, "group_id": group, "kind": sh.direction,
        "cause": "traffic", "status": ep.status, "start_s": sh.start_s, "end_s": sh.end_s,
        "closed_s": ep.closed_s, "observed": observed, "expected": expected, "log_p": log_p,
        "n_intervals": ep.n_intervals, "baseline_id": None,
        "detectors": orjson.dumps(list(sh.detectors)).decode(), "part_of": None,
        "summary": summary_sentence(ep, "traffic", interval_s=step, timezone=timezone,
                                    group=group, members=sh.detectors),
    }


def _write_communications_alerts(conn: Connection, writer: AlertWriter, group: str,
                                 members: Sequence[str], infos: dict[str, DetectorInfo],
                                 lo: int, hi: int, *, step: int) -> list[tuple[int, int, int]]:
    """The group's ``no_reports`` alerts over [lo, hi) as its members' evidence shows them now;
    (start, last start, alert id) of each."""
    subject = f"group:{group}"
    rows = store.evidence_rows(conn, members, lo, hi, kinds=("no_reports",))
    runs = communications_runs(rows, n_members=len(members), step=step)
    stored = {r.start_s: r for r in store.alerts_from(conn, subject, lo, kind="no_reports")}
    timezone = next(iter(infos.values())).timezone
    group_ids: list[tuple[int, int, int]] = []
    for run in runs:
        values = _group_values(run, group, step=step, hi=hi, timezone=timezone)
        alert_id = writer.upsert(stored.pop(run[0], None), values)
        group_ids.append((run[0], run[1], alert_id))
    for old in stored.values():
        if not old.withdrawn:
            writer.withdraw(old, NOT_TOGETHER)
    return group_ids


def _group_values(run: GroupRun, group: str, *, step: int, hi: int, timezone: str
                  ) -> dict[str, Any]:
    start, last, dets, expected, log_p = run
    subject = f"group:{group}"
    ep = Episode(subject=subject, detector_id=None, kind="no_reports", start_s=start,
                 end_s=last, closed_s=last + step if last + step < hi else None,
                 n_intervals=(last - start) // step + 1, observed=None, expected=expected,
                 log_p=log_p)
    return {
        "subject": subject, "detector_id": None, "group_id": group, "kind": "no_reports",
        "cause": "communications", "status": ep.status, "start_s": start, "end_s": last,
        "closed_s": ep.closed_s, "observed": None, "expected": expected, "log_p": log_p,
        "n_intervals": ep.n_intervals, "baseline_id": None,
        "detectors": orjson.dumps(dets).decode(), "part_of": None,
        "summary": summary_sentence(ep, "communications", interval_s=step, timezone=timezone,
                                    group=group, members=dets),
    }


def _refresh_detector_alert(conn: Connection, writer: AlertWriter, row: Any,
                            info: DetectorInfo, *, members: Sequence[str], group: str,
                            group_ids: Sequence[tuple[int, int, int]],
                            shift_ids: Sequence[tuple[SharedShift, int]] = ()) -> None:
    """A member's alert: its cause from the neighbors, its summary and the group alert it is
    part of (the group's communications alert, or the traffic alert of a shift most of the
    group shows)."""
    others = [m for m in members if m != row.detector_id]
    window_lo, window_hi = row.start_s - 2 * info.interval_s, row.end_s + 3 * info.interval_s
    shift_id = next((alert_id for sh, alert_id in shift_ids if sh.covers(row)), None)
    cause = cause_for(row.kind, others=others,
                      neighbor_kinds=store.neighbor_kinds(conn, others, window_lo, window_hi),
                      in_shared_shift=shift_id is not None)
    part_of = shift_id
    if row.kind == "no_reports":
        part_of = next((alert_id for start, last, alert_id in group_ids
                        if row.start_s <= last and row.end_s >= start), None)
    ep = Episode(subject=row.subject, detector_id=row.detector_id, kind=row.kind,
                 start_s=row.start_s, end_s=row.end_s, closed_s=row.closed_s,
                 n_intervals=row.n_intervals, observed=row.observed,
                 expected=row.expected or 0.0, log_p=row.log_p or 0.0)
    summary = summary_sentence(ep, cause, interval_s=info.interval_s, timezone=info.timezone,
                               label=info.label, group=group)
    if cause != row.cause or summary != row.summary or part_of != row.part_of:
        writer.upsert(row, {"cause": cause, "summary": summary, "part_of": part_of})
