"""Alert episodes from flagged intervals: grouping, likely cause and the sentence a person reads.

Pure Python: no database, no web. The scoring pass (``service.pipeline.score``) stores flagged
intervals as evidence rows; the functions here turn such rows (anything with the attributes of
``FlaggedInterval``) into ``Episode`` values, name a likely cause from what the detector's
group neighbors show, and write the one-line summary. Times are epoch seconds (UTC), interval
starts on the detector's grid; counts are vehicles per interval.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Protocol
from zoneinfo import ZoneInfo

# Trade facts (to move to ``service.domain`` when it names them).
LOW_KINDS = frozenset({"zero_counts", "low_volume"})  # kinds that say traffic went missing
NO_REPORTS_REOPEN_S = 2 * 3600  # gaps closer than this are one patchy-reporting episode

GroupRun = tuple[int, int, list[str], float, float]  # start, last start, members, expected, log p


class FlaggedInterval(Protocol):
    """One flagged interval of one detector, as the evidence table stores it."""

    @property
    def detector_id(self) -> str: ...
    @property
    def kind(self) -> str: ...
    @property
    def start_s(self) -> int: ...
    @property
    def log_p(self) -> float: ...
    @property
    def observed(self) -> float | None: ...
    @property
    def expected(self) -> float | None: ...


@dataclass
class Episode:
    subject: str
    detector_id: str | None
    kind: str
    start_s: int
    end_s: int  # start of the last anomalous interval
    closed_s: int | None
    n_intervals: int
    observed: float | None
    expected: float
    log_p: float

    @property
    def status(self) -> str:
        return "open" if self.closed_s is None else "closed"


# ----------------------------------------------------------------------------- grouping


def episodes_from_rows(detector_id: str, rows: Sequence[FlaggedInterval], *, interval_s: int,
                       scored_end_s: int, close_after: int) -> list[Episode]:
    """Group flagged intervals (sorted by kind, start) into episodes.

    An episode closes after ``close_after`` scored intervals without its flag; shorter gaps do
    not split it. Missing data closes as soon as data returns, but a new gap within
    ``NO_REPORTS_REOPEN_S`` (or ``close_after`` intervals, if longer) reopens the same episode:
    patchy reporting is one alert, not one per gap."""
    by_kind: dict[str, list[FlaggedInterval]] = {}
    for r in rows:
        by_kind.setdefault(r.kind, []).append(r)
    episodes: list[Episode] = []
    for kind, items in by_kind.items():
        items.sort(key=lambda r: r.start_s)
        closing = 1 if kind == "no_reports" else close_after
        split = max(close_after, NO_REPORTS_REOPEN_S // interval_s) if kind == "no_reports" \
            else close_after
        for part in _runs(items, interval_s=interval_s, split=split):
            episodes.append(_episode(detector_id, kind, part, interval_s=interval_s,
                                     closing=closing, scored_end_s=scored_end_s))
    return episodes


def _runs(items: Sequence[FlaggedInterval], *, interval_s: int, split: int
          ) -> list[list[FlaggedInterval]]:
    """Sorted intervals cut where ``split`` or more unflagged intervals lie between two."""
    runs: list[list[FlaggedInterval]] = []
    current: list[FlaggedInterval] = []
    for r in items:
        if current and (r.start_s - current[-1].start_s) // interval_s - 1 >= split:
            runs.append(current)
            current = []
        current.append(r)
    if current:
        runs.append(current)
    return runs


def _episode(detector_id: str, kind: str, part: Sequence[FlaggedInterval], *, interval_s: int,
             closing: int, scored_end_s: int) -> Episode:
    """One run's episode: closed once ``closing`` intervals after its last were scored."""
    last = part[-1].start_s
    closes_at = last + interval_s * (closing + 1)
    observed = None if kind == "no_reports" else float(sum(p.observed or 0 for p in part))
    return Episode(
        subject=detector_id, detector_id=detector_id, kind=kind,
        start_s=part[0].start_s, end_s=last,
        closed_s=closes_at - interval_s if closes_at <= scored_end_s else None,
        n_intervals=len(part), observed=observed,
        expected=float(sum(p.expected or 0 for p in part)),
        log_p=float(min(p.log_p for p in part)))


def communications_runs(rows: Sequence[FlaggedInterval], *, n_members: int, step: int
                        ) -> list[GroupRun]:
    """Stretches where most of a group's ``n_members`` detectors are flagged missing together.

    ``rows`` are the group's ``no_reports`` intervals; ``step`` the group's shortest interval (s).
    Returns (start, last start, members, expected, strongest log p) per stretch."""
    need = max(2, math.ceil(n_members / 2))
    at: dict[int, dict[str, FlaggedInterval]] = {}
    for r in rows:
        at.setdefault(r.start_s, {})[r.detector_id] = r
    runs: list[GroupRun] = []
    current: list[int] = []
    for t in sorted(at):
        if len(at[t]) < need:
            continue
        if current and t - current[-1] > step:
            runs.append(_group_run(current, at))
            current = []
        current.append(t)
    if current:
        runs.append(_group_run(current, at))
    return runs


def _group_run(times: list[int], at: dict[int, dict[str, FlaggedInterval]]) -> GroupRun:
    dets = sorted({d for t in times for d in at[t]})
    expected = float(sum(r.expected or 0 for t in times for r in at[t].values()))
    log_p = float(min(r.log_p for t in times for r in at[t].values()))
    return times[0], times[-1], dets, expected, log_p


# ----------------------------------------------------------------------------- shared shifts

SHIFT_JOIN_S = 2 * 3600  # a group's shift episodes closer than this are one traffic event
# Members of a group alert at once if their alerts lie within this of each other: on a shift
# their CUSUMs reach the limit at different times (different volumes, different evidence).
TOGETHER_S = 3600
HIGH_KINDS = frozenset({"high_volume"})  # kinds that say extra traffic arrived
VOLUME_KINDS = frozenset({"low_volume", "high_volume"})  # a day-long shift's on-and-off alerts


class MemberAlert(Protocol):
    """A live volume alert of one group member, as the alerts table stores it."""

    @property
    def detector_id(self) -> str | None: ...
    @property
    def kind(self) -> str: ...
    @property
    def start_s(self) -> int: ...
    @property
    def end_s(self) -> int: ...


@dataclass(frozen=True)
class SharedShift:
    """A stretch where most of a group's detectors deviated the same way at once: one traffic
    event for the group (never a detector or controller fault)."""

    direction: str  # "low_volume" (traffic went missing) or "high_volume"
    start_s: int  # start of the first member alert taking part
    end_s: int  # start of the last anomalous interval of the last member alert
    detectors: tuple[str, ...]  # the members that deviated
    day_lo_s: int = 0  # the group's local day of the shift: volume alerts of the same
    day_hi_s: int = 0  # direction that day belong to it (empty span: none)
    together: tuple[tuple[int, int], ...] = ()  # [lo, hi) where most members deviated at once

    def covers(self, alert: MemberAlert) -> bool:
        """True when ``alert`` deviates this way and overlaps a stretch where most members
        deviated at once, or is a volume alert (not a run of zeros) of the same direction
        overlapping the shift or on its local day."""
        if shift_direction(alert.kind) != self.direction:
            return False
        if any(alert.start_s < hi and alert.end_s >= lo for lo, hi in self.together):
            return True
        if alert.kind not in VOLUME_KINDS:
            return False
        return (alert.start_s <= self.end_s and alert.end_s >= self.start_s) \
            or self.day_lo_s <= alert.start_s < self.day_hi_s


def shift_direction(kind: str) -> str | None:
    """``low_volume`` for kinds saying traffic went missing, ``high_volume`` for extra
    traffic, None for kinds that say nothing about traffic (frozen values, missing reports,
    counts beyond capacity)."""
    if kind in LOW_KINDS:
        return "low_volume"
    if kind in HIGH_KINDS:
        return "high_volume"
    return None


def _member_spans(alerts: Sequence[MemberAlert], step: int) -> list[tuple[int, int]]:
    """Sweep events (+1 at a member's start, -1 ``TOGETHER_S`` after its end), a member's
    overlaps merged."""
    spans: dict[str, list[tuple[int, int]]] = {}
    for a in sorted(alerts, key=lambda a: a.start_s):
        own = spans.setdefault(str(a.detector_id), [])
        end = a.end_s + step + TOGETHER_S
        if own and a.start_s <= own[-1][1]:
            own[-1] = (own[-1][0], max(own[-1][1], end))
        else:
            own.append((a.start_s, end))
    return sorted((t, d) for sp in spans.values() for lo, hi in sp for t, d in ((lo, 1), (hi, -1)))


def shared_shifts(alerts: Sequence[MemberAlert], *, n_members: int, step: int,
                  join_s: int = SHIFT_JOIN_S,
                  day_bounds: Callable[[int], tuple[int, int]] | None = None
                  ) -> list[SharedShift]:
    """Stretches where at least half of a group's ``n_members`` detectors (and at least two)
    have live alerts of the same direction at once (within ``TOGETHER_S`` of each other).

    Several detectors of a group moving together point to traffic (an unlisted holiday,
    weather, an event), not to each detector. Each member alert spans ``[start_s, end_s +
    step)``; stretches of the same direction closer than ``join_s`` are one event. With
    ``day_bounds`` (epoch seconds -> the group's local day ``[lo, hi)`` containing it), the
    stretches of one direction on one local day are one event, and the members' volume
    alerts of that direction that day belong to it: a day-long shift (an unlisted holiday)
    makes the members alert on and off all day as their levels catch up, and those alerts are
    the same traffic event, not detector faults. Runs of zeros join an event only where they
    overlap it (a dead loop during an event is still its own alert). ``step`` is the group's
    shortest interval (seconds)."""
    need = max(2, math.ceil(n_members / 2))
    out: list[SharedShift] = []
    for direction in ("low_volume", "high_volume"):
        mine = [a for a in alerts if a.detector_id is not None
                and shift_direction(a.kind) == direction]
        active, opened = 0, None
        together: list[list[int]] = []
        for t, d in _member_spans(mine, step):
            active += d
            if active >= need and opened is None:
                opened = t
            elif active < need and opened is not None:
                if together and opened - together[-1][1] < join_s:
                    together[-1][1] = t
                else:
                    together.append([opened, t])
                opened = None
        days: dict[tuple[int, int], list[list[int]]] = {}
        for lo, hi in together:
            day = day_bounds(lo) if day_bounds is not None else (lo, lo)
            days.setdefault(day, []).append([lo, hi])
        for (day_lo, day_hi), runs in days.items():
            part = [a for a in mine if any(a.start_s < hi and a.end_s + step > lo
                                           for lo, hi in runs)
                    or (a.kind in VOLUME_KINDS and day_lo <= a.start_s < day_hi)]
            out.append(SharedShift(
                direction=direction, start_s=min(a.start_s for a in part),
                end_s=max(a.end_s for a in part),
                detectors=tuple(sorted({str(a.detector_id) for a in part})),
                day_lo_s=day_lo, day_hi_s=day_hi,
                together=tuple((lo, hi) for lo, hi in runs)))
    # events grown to their member alerts may now overlap: merge those of one direction
    merged: list[SharedShift] = []
    for sh in sorted(out, key=lambda s: (s.direction, s.start_s)):
        last = merged[-1] if merged else None
        if last is not None and last.direction == sh.direction and sh.start_s <= last.end_s:
            merged[-1] = SharedShift(last.direction, last.start_s, max(last.end_s, sh.end_s),
                                     tuple(sorted(set(last.detectors) | set(sh.detectors))),
                                     min(last.day_lo_s, sh.day_lo_s),
                                     max(last.day_hi_s, sh.day_hi_s),
                                     last.together + sh.together)
        else:
            merged.append(sh)
    return merged


# ----------------------------------------------------------------------------- causes


def cause_for(kind: str, *, others: Sequence[str], neighbor_kinds: dict[str, set[str]],
              in_shared_shift: bool = False) -> str:
    """Likely cause of an episode from what the detector's group neighbors show meanwhile.

    ``traffic``: the episode is part of a shift most of the group shows (``in_shared_shift``,
    see ``shared_shifts``), or at least one neighbor deviates the same way at the same time
    (several detectors of one group together point to traffic). ``detector``: the neighbors
    look normal. ``communications``: missing data, or values frozen on several detectors at
    once (a stuck controller or polling fault). ``unknown``: no neighbors to compare."""
    if kind == "no_reports":
        return "communications"
    if in_shared_shift and shift_direction(kind) is not None:
        return "traffic"
    if not others:
        return "unknown"
    if kind == "repeated_value":  # frozen together: the controller or its polling, not a loop
        together = any("repeated_value" in neighbor_kinds.get(o, set()) for o in others)
        return "communications" if together else "detector"
    if kind == "over_capacity":
        return "detector"
    same = LOW_KINDS if kind in LOW_KINDS else frozenset({"high_volume", "over_capacity"})
    if any(neighbor_kinds.get(o, set()) & same for o in others):
        return "traffic"
    return "detector"


# ----------------------------------------------------------------------------- text
#
# One template per kind, and one cause phrase per (kind, cause): the sentence names the place,
# what was seen against what was expected, when (the detector's local time, with weekday, day
# and month: "since Tue 17 Nov 17:10"), for how long, and the likely cause only where there is
# one. tests/stats/test_sentences.py renders every kind x cause.

SENTENCE_TARGET = 200  # characters; met whenever the place's name leaves room

_CAUSE_PHRASES: dict[tuple[str, str], str] = {
    ("zero_counts", "detector"): "likely a dead loop or detector card",
    ("low_volume", "detector"): "likely an undercounting loop or detector card",
    ("high_volume", "detector"): "likely a chattering or double-counting detector",
    ("over_capacity", "detector"): "likely a double-counting detector",
    ("repeated_value", "detector"): "likely a stuck detector card",
    ("zero_counts", "traffic"): "likely a traffic event: other lanes here drop too",
    ("low_volume", "traffic"): "likely a traffic event: other lanes here drop too",
    ("high_volume", "traffic"): "likely a traffic event: other lanes here rise too",
    ("repeated_value", "communications"): "likely a frozen controller: others here repeat too",
    ("no_reports", "communications"): "likely a controller or communications loss",
}


def cause_phrase(kind: str, cause: str) -> str | None:
    """The likely cause in words, or None where the evidence names none (``unknown``)."""
    return _CAUSE_PHRASES.get((kind, cause))


def _duration(seconds: int) -> str:
    minutes = max(1, round(seconds / 60))
    if minutes < 60:
        return f"{minutes} min"
    hours, rest = divmod(minutes, 60)
    if hours < 48:
        return f"{hours} h {rest:02d} min" if rest else f"{hours} h"
    return f"{hours / 24:.1f} days"


def _local(t: int, tz: str) -> datetime:
    return datetime.fromtimestamp(t, ZoneInfo(tz))


def _stamp(moment: datetime) -> str:
    """Weekday, day, month name and 24-hour time: never read as a range ("Tue 17 Nov 17:10")."""
    return f"{moment:%a} {moment.day} {moment:%b %H:%M}"


def _span(ep: Episode, interval_s: int, timezone: str) -> str:
    """How long and when, in the detector's local time: "for 2 h since Tue 17 Nov 17:10" while
    open, "for 2 h, Tue 17 Nov 17:10–19:10" once closed (the end's date only if it differs)."""
    span_end = ep.end_s + interval_s
    length = _duration(span_end - ep.start_s)
    start = _local(ep.start_s, timezone)
    if ep.closed_s is None:
        return f"for {length} since {_stamp(start)}"
    end = _local(span_end, timezone)
    end_text = f"{end:%H:%M}" if end.date() == start.date() else _stamp(end)
    return f"for {length}, {_stamp(start)}–{end_text}"


def common_site(labels: Sequence[str | None]) -> str | None:
    """The leading comma-separated parts that all labels share ("Brannock Ave & Third St, EB
    approach" for its lanes' labels), or None when they share nothing."""
    parts = [[p.strip() for p in (lb or "").split(",")] for lb in labels]
    if not parts or any(not p[0] for p in parts):
        return None
    shared: list[str] = []
    for column in zip(*parts, strict=False):
        if len(set(column)) != 1:
            break
        shared.append(column[0])
    return ", ".join(shared) or None


def _vehicles(n: float) -> str:
    return f"{n:,.0f} vehicle" + ("" if round(n) == 1 else "s")


def summary_sentence(ep: Episode, cause: str, *, interval_s: int, timezone: str,
                     label: str | None = None, group: str | None = None,
                     members: Sequence[str] = (), group_size: int | None = None,
                     site: str | None = None, cap_per_interval: float | None = None) -> str:
    """One sentence a person can read on a phone (see the template notes above).

    ``members`` are a group alert's silent detectors, ``group_size`` the group's detectors in
    all, ``site`` the place they share (:func:`common_site`); ``cap_per_interval`` the count
    above which an interval is physically implausible (over-capacity alerts)."""
    span = _span(ep, interval_s, timezone)
    if ep.detector_id is None:  # a group's alert: an outage, or a shift most members show
        place = site or (f"group {group}" if group else ep.subject)
        of = f" of {group_size}" if group_size else ""
        phrase: str | None
        if ep.kind == "no_reports":
            text = f"{place}: no reports from {len(members)}{of} detectors {span}"
            phrase = "likely a controller or communications loss"
        else:
            observed, expected = ep.observed or 0.0, ep.expected
            share = observed / expected if expected else 0.0
            text = (f"{place}: {len(members)}{of} detectors counted {_vehicles(observed)} "
                    f"{span}, {share:.0%} of the {expected:,.0f} expected")
            way = "drop" if ep.kind in LOW_KINDS else "rise"
            phrase = f"likely a traffic event: most detectors here {way} together"
    else:
        place = label or ep.detector_id
        head, tail = _observation(ep, interval_s, cap_per_interval)
        text = f"{place}: {head} {span}{tail}"
        patchy = ep.kind == "no_reports" and _is_patchy(ep, interval_s)
        phrase = "likely a communications fault" if patchy else cause_phrase(ep.kind, cause)
        if ep.kind == "repeated_value" and cause == "unknown":
            phrase = "likely a stuck detector card or frozen controller"
    return f"{text}; {phrase}." if phrase else f"{text}."


def _is_patchy(ep: Episode, interval_s: int) -> bool:
    return ep.n_intervals * interval_s < ep.end_s + interval_s - ep.start_s


def _observation(ep: Episode, interval_s: int, cap_per_interval: float | None
                 ) -> tuple[str, str]:
    """What was seen (before the time span) and what was expected (after it), by kind."""
    observed, expected = ep.observed or 0.0, ep.expected
    if ep.kind == "no_reports":
        if _is_patchy(ep, interval_s):
            spanned = (ep.end_s + interval_s - ep.start_s) // interval_s
            return f"reported {spanned - ep.n_intervals} of {spanned} intervals", ""
        return "no reports", ""
    if ep.kind == "zero_counts":
        return "counted 0 vehicles", f", where about {expected:,.0f} were expected"
    if ep.kind == "low_volume":
        share = observed / expected if expected else 0.0
        return f"counted {_vehicles(observed)}", f", {share:.0%} of the {expected:,.0f} expected"
    if ep.kind == "high_volume":
        ratio = observed / expected if expected else float("inf")
        return f"counted {_vehicles(observed)}", f", {ratio:.1f}× the {expected:,.0f} expected"
    if ep.kind == "over_capacity":
        limit = (f" (max {cap_per_interval:,.0f} per {interval_s // 60} min)"
                 if cap_per_interval else "")
        return f"counted {_vehicles(observed)}", f", more than its lanes can carry{limit}"
    value = observed / ep.n_intervals if ep.n_intervals else observed
    return f"reported the same count, {value:,.0f}, {ep.n_intervals} times in a row", ""
