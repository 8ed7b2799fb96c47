"""Alerts from evidence: rebuild a detector's episodes and reconcile them with stored alerts,
then refresh its group's causes and communications alerts.

Runs inside the scoring pass's write transaction (``service.pipeline.score.write_scored``).
Episodes are matched to stored alerts by (subject, kind, start). That key is unique over *all*
stored alerts, withdrawn ones included, and the lookup reads withdrawn ones too: when later data
supports a withdrawn alert again, the same row comes back (same ``id``, ``withdrawn`` false, a
new ``seq`` so pollers see it), never a second row.

Service states (``service.domain.SERVICE_STATES``): an alert first raised (or revived) while
its detector is out of service is stored as ``suppressed``; missing data of a retired detector
from its retirement on is not evidence; a group outage counts only members in service.

A group outage alert closes only once every in-service member with a baseline has been scored
``close_after`` intervals past the outage's last interval with fewer than the required share
still silent: a member that has not been scored that far yet is not taken to have reported,
so one interval from one member does not close the alert for a minute and reopen it. Gaps of
fewer than ``close_after`` intervals do not split an outage.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import orjson
from sqlalchemy import Connection

from service.stats.capacity import capacity_cap
from service.stats.episodes import (
    NO_REPORTS_REOPEN_S,
    SHIFT_JOIN_S,
    Episode,
    GroupRun,
    SharedShift,
    cause_for,
    common_site,
    communications_runs,
    episodes_from_rows,
    shared_shifts,
    summary_sentence,
)
from service.store import scoring as store
from service.store.detectors import MemberState, member_states
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
    state = member_states(conn, [info.detector_id], now=writer.now)[info.detector_id]
    if state.state == "retired" and state.clock_s is not None:
        # No longer expected to report: missing data from the retirement on is not evidence.
        rows = [r for r in rows if r.kind != "no_reports" or r.start_s < state.clock_s]
    episodes = episodes_from_rows(info.detector_id, rows, interval_s=step,
                                  scored_end_s=end_s, close_after=close_after)
    # Withdrawn alerts too: an episode that later data supports again revives its row.
    stored = {(r.kind, r.start_s): r for r in store.alerts_from(conn, info.detector_id, lo)}
    for ep in episodes:
        old = stored.pop((ep.kind, ep.start_s), None)
        values = _episode_values(ep, info, baseline_id, "unknown")
        if old is None or old.withdrawn:  # raised now: suppressed while out of service
            values["suppressed"] = int(state.state == "out_of_service")
        writer.upsert(old, values)
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
        "summary": _detector_summary(ep, cause, info),
    }


def _detector_summary(ep: Episode, cause: str, info: DetectorInfo) -> str:
    cap = capacity_cap(info.road_class, lanes=info.lanes, interval_s=info.interval_s,
                       per_lane_hourly=info.capacity_per_lane_h) \
        if ep.kind == "over_capacity" else None
    return summary_sentence(ep, cause, interval_s=info.interval_s, timezone=info.timezone,
                            label=info.label, group=info.group, cap_per_interval=cap)


def refresh_group(conn: Connection, writer: AlertWriter, group: str, lo: int, hi: int, *,
                  close_after: int) -> None:
    """Causes of the group's alerts near [lo, hi), and its communications alerts."""
    members = store.group_members(conn, group)
    infos = store.load_infos(conn, members)
    step = min(i.interval_s for i in infos.values())
    pad = (close_after + 2) * step
    earlier = store.earliest_alert_ending_after(conn, f"group:{group}", lo - pad)
    lo = min(lo, int(earlier)) if earlier is not None else lo
    states = member_states(conn, members, now=writer.now)
    in_service = [m for m in members if states[m].state == "in_service"]
    group_ids = _write_communications_alerts(conn, writer, group, in_service, states, infos,
                                             lo - pad, hi, step=step, close_after=close_after)
    shift_ids = _write_shift_alerts(conn, writer, group, in_service, infos, lo - pad, hi,
                                    step=step)
    for row in store.group_detector_alerts(conn, group, lo - pad, hi + pad):
        _refresh_detector_alert(conn, writer, row, infos[row.detector_id], members=members,
                                group=group, group_ids=group_ids, slack_s=close_after * step,
                                shift_ids=shift_ids)


GroupAlert = tuple[int, int, int, bool, frozenset[str]]  # start, last start, id, open, members


def _judged_until(members: Sequence[str], states: dict[str, MemberState], *, lo: int,
                  hi: int) -> int:
    """Up to when every in-service member with a baseline has been scored (epoch s): a
    member's silence after that is not known yet, so an outage cannot be seen to end there."""
    ends = [st.scored_through_s if st.scored_through_s is not None else lo
            for m in members if (st := states[m]).has_baseline]
    return min(ends) if ends else hi


def _merge_runs(runs: Sequence[GroupRun], *, step: int, close_after: int) -> list[GroupRun]:
    """Runs less than ``close_after`` intervals apart, as one outage."""
    merged: list[GroupRun] = []
    for run in runs:
        if merged and (run[0] - merged[-1][1]) // step - 1 < close_after:
            start, _, dets, expected, log_p = merged[-1]
            merged[-1] = (start, run[1], sorted({*dets, *run[2]}), expected + run[3],
                          min(log_p, run[4]))
        else:
            merged.append(run)
    return merged


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
    site = common_site([infos[m].label for m in members if m in infos])
    stored = {(r.kind, r.start_s): r for kind in ("low_volume", "high_volume")
              for r in store.alerts_from(conn, subject, lo, kind=kind)}
    out: list[tuple[SharedShift, int]] = []
    for sh in shifts:
        values = _shift_values(sh, rows, group, step=step, hi=hi, timezone=timezone,
                               site=site, group_size=len(members))
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
                  timezone: str, site: str | None, group_size: int) -> dict[str, Any]:
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
                                    group=group, members=sh.detectors, group_size=group_size,
                                    site=site),
    }


def _write_communications_alerts(conn: Connection, writer: AlertWriter, group: str,
                                 members: Sequence[str], states: dict[str, MemberState],
                                 infos: dict[str, DetectorInfo], lo: int, hi: int, *,
                                 step: int, close_after: int) -> list[GroupAlert]:
    """The group's ``no_reports`` alerts over [lo, hi) as its in-service ``members``' evidence
    shows them now."""
    subject = f"group:{group}"
    judged = _judged_until(members, states, lo=lo, hi=hi)
    rows = store.evidence_rows(conn, members, lo, max(hi, judged), kinds=("no_reports",)) \
        if members else []
    runs = _merge_runs(communications_runs(rows, n_members=len(members), step=step),
                       step=step, close_after=close_after)
    stored = {r.start_s: r for r in store.alerts_from(conn, subject, lo, kind="no_reports")}
    timezone = next(iter(infos.values())).timezone
    site = common_site([infos[m].label for m in members if m in infos])
    group_ids: list[GroupAlert] = []
    for run in runs:
        closed = run[1] + (close_after + 1) * step <= judged
        values = _group_values(run, group, step=step, closed=closed, timezone=timezone,
                               site=site, group_size=len(members))
        alert_id = writer.upsert(stored.pop(run[0], None), values)
        group_ids.append((run[0], run[1], alert_id, not closed, frozenset(run[2])))
    for old in stored.values():
        if not old.withdrawn:
            writer.withdraw(old, NOT_TOGETHER)
    return group_ids


def _group_values(run: GroupRun, group: str, *, step: int, closed: bool, timezone: str,
                  site: str | None, group_size: int) -> dict[str, Any]:
    start, last, dets, expected, log_p = run
    subject = f"group:{group}"
    ep = Episode(subject=subject, detector_id=None, kind="no_reports", start_s=start,
                 end_s=last, closed_s=last + step if closed else None,
                 n_intervals=(last - start) // step + 1, observed=None, expected=expected,
                 log_p=log_p)
    return {
        "subject": subject, "detector_id": None, "group_id": group, "kind": "no_reports",
        "cause": "communications", "status": ep.status, "start_s": start, "end_s": last,
        "closed_s": ep.closed_s, "observed": None, "expected": expected, "log_p": log_p,
        "n_intervals": ep.n_intervals, "baseline_id": None,
        "detectors": orjson.dumps(dets).decode(), "part_of": None,
        "summary": summary_sentence(ep, "communications", interval_s=step, timezone=timezone,
                                    group=group, members=dets, group_size=group_size,
                                    site=site),
    }


def _refresh_detector_alert(conn: Connection, writer: AlertWriter, row: Any,
                            info: DetectorInfo, *, members: Sequence[str], group: str,
                            group_ids: Sequence[GroupAlert], slack_s: int,
                            shift_ids: Sequence[tuple[SharedShift, int]] = ()) -> None:
    """A member's alert: its cause from the neighbors, its summary and the group alert it is
    part of: the traffic alert of a shift most of the group shows, or, for missing data, a
    group outage it belongs to while that outage is open, or when it closed having ended
    within ``slack_s`` of the outage's end; one still open, or ended later, once the outage
    closed is shown on its own (the list and the detector's health agree)."""
    others = [m for m in members if m != row.detector_id]
    window_lo, window_hi = row.start_s - 2 * info.interval_s, row.end_s + 3 * info.interval_s
    shift_id = next((alert_id for sh, alert_id in shift_ids if sh.covers(row)), None)
    cause = cause_for(row.kind, others=others,
                      neighbor_kinds=store.neighbor_kinds(conn, others, window_lo, window_hi),
                      in_shared_shift=shift_id is not None)
    part_of = shift_id
    if row.kind == "no_reports":
        part_of = next((alert_id for start, last, alert_id, is_open, dets in group_ids
                        if row.detector_id in dets and row.start_s <= last
                        and row.end_s >= start
                        and (is_open or (row.status == "closed" and row.end_s <= last + slack_s))),
                       None)
    ep = Episode(subject=row.subject, detector_id=row.detector_id, kind=row.kind,
                 start_s=row.start_s, end_s=row.end_s, closed_s=row.closed_s,
                 n_intervals=row.n_intervals, observed=row.observed,
                 expected=row.expected or 0.0, log_p=row.log_p or 0.0)
    summary = _detector_summary(ep, cause, info)
    if cause != row.cause or summary != row.summary or part_of != row.part_of:
        writer.upsert(row, {"cause": cause, "summary": summary, "part_of": part_of})
