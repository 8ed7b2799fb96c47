"""Alert episodes from flagged intervals: grouping, likely cause and the sentence a person reads.

Pure Python: no database, no web. The scoring pass (``service.pipeline.score``) stores flagged
intervals as evidence rows; the functions here turn such rows (anything with the attributes of
``FlaggedInterval``) into ``Episode`` values, name a likely cause from what the detector's
group neighbors show, and write the one-line summary. Times are epoch seconds (UTC), interval
starts on the detector's grid; counts are vehicles per interval.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
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


# ----------------------------------------------------------------------------- causes


def cause_for(kind: str, *, others: Sequence[str], neighbor_kinds: dict[str, set[str]]) -> str:
    """Likely cause of an episode from what the detector's group neighbors show meanwhile.

    ``traffic``: at least one neighbor deviates the same way at the same time (several
    detectors of one group together point to traffic). ``detector``: the neighbors look
    normal. ``communications``: missing data, or values frozen on several detectors at once
    (a stuck controller or polling fault). ``unknown``: no neighbors to compare."""
    if kind == "no_reports":
        return "communications"
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
    if ep.detector_id is None:  # a group's communications alert
        place = site or (f"group {group}" if group else ep.subject)
        of = f" of {group_size}" if group_size else ""
        text = f"{place}: no reports from {len(members)}{of} detectors {span}"
        phrase: str | None = "likely a controller or communications loss"
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
