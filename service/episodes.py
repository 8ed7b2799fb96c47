"""Evidence to alert episodes, their likely cause, and a sentence a person can read.

Pure Python/numpy: no web or database imports. Times are epoch seconds (UTC) and converted to
the detector's local time only for the sentence; counts are vehicles.

Episodes
--------
Consecutive anomalous intervals of one kind form one episode; a stretch of fewer than
``close_after`` normal intervals inside it does not split it, and it closes once ``close_after``
normal intervals follow its last anomalous interval (a ``no_data`` episode closes as soon as data
returns). Run tests only become conclusive part-way through a run, so a ``no_counts``,
``repeated_value`` or ``no_data`` episode starts at the beginning of its run (the first of the
zeros, of the repeated counts, of the missing intervals), not at the interval where the run
became improbable.

Causes
------
``traffic``
    several detectors of the same group (at least two, and at least half of the group's members
    reporting at the time) deviate in the same direction at overlapping times: ``no_counts`` or
    ``low_volume`` together, or ``high_volume`` together.
``detector``
    this detector deviates while its group's other reporting members look normal, and there are
    at least two of them; ``over_capacity`` and ``repeated_value`` are detector faults whenever a
    neighbour is reporting (a count beyond capacity is not traffic).
``communications``
    ``no_data`` on most detectors of a group together (or of the whole network), or
    ``repeated_value`` on most of a group together (a stuck controller or polling fault).
``unknown``
    no group, or not enough neighbours reporting to tell.
"""

from __future__ import annotations

import math
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, tzinfo
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np

from .scoring import KINDS

__all__ = [
    "CAUSES",
    "KINDS",
    "Episode",
    "attribute_causes",
    "build_episodes",
    "summary_sentence",
]

CAUSES = ("detector", "traffic", "communications", "unknown")

_LOW = frozenset({"no_counts", "low_volume"})
_HIGH = frozenset({"high_volume"})


@dataclass(frozen=True)
class Episode:
    """One alert episode of one detector and kind.

    Attributes
    ----------
    detector_id : str
        The detector.
    kind : str
        One of ``KINDS``.
    start_s : int
        Start of the first interval of the episode (epoch seconds).
    end_s : int
        Start of the last anomalous interval (epoch seconds).
    closed : bool
        Whether enough normal intervals have followed to close it.
    closed_at_s : int or None
        End of the interval that closed it (epoch seconds), None while open.
    observed : float
        Vehicles counted over the episode's span (0 for ``no_data``).
    expected : float
        Vehicles expected over the same intervals (for ``no_data``: over the missing ones).
    log_p : float
        Natural-log p-value of the strongest evidence in the episode.
    n_intervals : int
        Intervals spanned from ``start_s`` to ``end_s`` inclusive.
    """

    detector_id: str
    kind: str
    start_s: int
    end_s: int
    closed: bool
    closed_at_s: int | None
    observed: float
    expected: float
    log_p: float
    n_intervals: int


def _run_start(kind: str, first: int, floor: int, observed: np.ndarray) -> int:
    """Walk back from ``first`` to the start of the run that made the episode."""
    missing = np.isnan(observed)
    i = first
    if kind == "no_counts":
        while i - 1 >= floor and (missing[i - 1] or observed[i - 1] == 0):
            i -= 1
        while i < first and missing[i]:
            i += 1
    elif kind == "repeated_value":
        value = observed[first]
        while i - 1 >= floor and (missing[i - 1] or observed[i - 1] == value):
            i -= 1
        while i < first and missing[i]:
            i += 1
    elif kind == "no_data":
        while i - 1 >= floor and missing[i - 1]:
            i -= 1
    return i


def build_episodes(
    detector_id: str,
    start_s: int,
    evidence: Any,
    *,
    observed: Any,
    expected: Any,
    interval_s: int,
    close_after: int,
) -> list[Episode]:
    """Group flagged intervals into episodes, per kind.

    Parameters
    ----------
    detector_id : str
        The detector the evidence belongs to.
    start_s : int
        Start of the first interval of ``evidence`` (epoch seconds).
    evidence : scoring.Evidence
        Anything with ``flag[kind]`` (bool arrays) and ``log_p[kind]`` (float arrays).
    observed : array_like
        Vehicles counted per interval, NaN where no count was reported.
    expected : array_like
        Vehicles expected per interval.
    interval_s : int
        Interval length in seconds.
    close_after : int
        Normal intervals in a row that close an episode (>= 1).

    Returns
    -------
    list of Episode
        Sorted by start time, then kind.
    """
    if close_after < 1:
        raise ValueError("close_after must be at least 1")
    obs = np.asarray(observed, dtype=float)
    exp = np.asarray(expected, dtype=float)
    n = obs.size
    if exp.size != n:
        raise ValueError("observed and expected must have one value per interval")
    out: list[Episode] = []
    for kind in KINDS:
        flags = np.asarray(evidence.flag[kind], dtype=bool)
        if flags.size != n:
            raise ValueError(f"evidence for {kind} has {flags.size} intervals, expected {n}")
        idx = np.flatnonzero(flags)
        if idx.size == 0:
            continue
        log_p = np.asarray(evidence.log_p[kind], dtype=float)
        gap_closes = 1 if kind == "no_data" else close_after
        # normal intervals between consecutive flagged ones; enough of them close the episode
        splits = np.flatnonzero(np.diff(idx) - 1 >= gap_closes) + 1
        floor = 0
        for group in np.split(idx, splits):
            first, last = int(group[0]), int(group[-1])
            first = _run_start(kind, first, floor, obs)
            span = slice(first, last + 1)
            seen = ~np.isnan(obs[span])
            if kind == "no_data":
                total_obs = 0.0
                total_exp = float(exp[span][~seen].sum())
            else:
                total_obs = float(obs[span][seen].sum())
                total_exp = float(exp[span][seen].sum())
            closed = n - 1 - last >= gap_closes
            out.append(Episode(
                detector_id=detector_id,
                kind=kind,
                start_s=int(start_s + first * interval_s),
                end_s=int(start_s + last * interval_s),
                closed=bool(closed),
                closed_at_s=int(start_s + (last + gap_closes + 1) * interval_s) if closed else None,
                observed=total_obs,
                expected=total_exp,
                log_p=float(log_p[group].min()),
                n_intervals=last - first + 1,
            ))
            floor = last + 1
    out.sort(key=lambda e: (e.start_s, KINDS.index(e.kind)))
    return out


def _overlaps(a: Episode, b: Episode, overlap_s: float) -> bool:
    return a.start_s <= b.end_s + overlap_s and b.start_s <= a.end_s + overlap_s


def attribute_causes(
    episodes_by_detector: Mapping[str, Sequence[Episode]],
    groups: Mapping[str, Hashable | None],
    *,
    overlap_s: float,
) -> dict[tuple[str, str, int], str]:
    """Name the likely cause of every episode from what its neighbours did at the same time.

    Parameters
    ----------
    episodes_by_detector : Mapping[str, Sequence[Episode]]
        Episodes of every detector that was scored over the period, including those with none
        (an empty list means the detector reported and looked normal; a detector left out is
        treated as not reporting).
    groups : Mapping[str, hashable or None]
        Group of each detector (lanes of one approach, stations of one corridor), None if none.
    overlap_s : float
        Slack in seconds when deciding whether two episodes overlap in time.

    Returns
    -------
    dict
        ``(detector_id, kind, start_s) -> cause``, cause one of ``CAUSES``; rules in the module
        docstring.
    """
    members: dict[Hashable, list[str]] = {}
    for det, grp in groups.items():
        if grp is not None:
            members.setdefault(grp, []).append(det)
    scored = [d for d in episodes_by_detector]

    def overlapping(det: str, e: Episode, kinds: frozenset[str]) -> bool:
        return any(o.kind in kinds and _overlaps(o, e, overlap_s)
                   for o in episodes_by_detector.get(det, ()))

    def reporting(det: str, e: Episode) -> bool:
        return det in episodes_by_detector and not overlapping(det, e, frozenset({"no_data"}))

    def most_together(dets: Sequence[str], e: Episode, kinds: frozenset[str]) -> bool:
        together = sum(1 for d in dets if overlapping(d, e, kinds))
        return together >= 2 and together > len(dets) / 2

    causes: dict[tuple[str, str, int], str] = {}
    for det, eps in episodes_by_detector.items():
        grp = groups.get(det)
        group_dets = [d for d in members.get(grp, []) if d in episodes_by_detector] \
            if grp is not None else []
        others = [d for d in group_dets if d != det]
        for e in eps:
            cause = "unknown"
            if e.kind == "no_data":
                if (group_dets and most_together(group_dets, e, frozenset({"no_data"}))) or \
                        most_together(scored, e, frozenset({"no_data"})):
                    cause = "communications"
            elif grp is None:
                cause = "unknown"
            elif e.kind in _LOW or e.kind in _HIGH:
                direction = _LOW if e.kind in _LOW else _HIGH
                rep = [d for d in others if reporting(d, e)]
                same = [d for d in rep if overlapping(d, e, direction)]
                together = 1 + len(same)
                if together >= 2 and together >= (1 + len(rep)) / 2:
                    cause = "traffic"
                elif not same and len(rep) >= 2:
                    cause = "detector"
            elif e.kind == "repeated_value" and most_together(
                    group_dets, e, frozenset({"repeated_value"})):
                cause = "communications"
            elif any(reporting(d, e) for d in others):  # over_capacity, repeated_value
                cause = "detector"
            causes[(det, e.kind, e.start_s)] = cause
    return causes


def _about(x: float) -> str:
    """A rounded figure a person reads at a glance: 2 significant digits, at least units."""
    if x < 10:
        return f"{x:.0f}" if x >= 1 else f"{x:.1f}"
    digits = int(math.floor(math.log10(x))) - 1
    return f"{round(x, -digits):,.0f}"


def _duration(seconds: int) -> str:
    minutes = int(round(seconds / 60))
    if minutes < 60:
        return f"{minutes} min"
    hours, minutes = divmod(minutes, 60)
    if hours < 24:
        return f"{hours} h {minutes} min" if minutes else f"{hours} h"
    days, hours = divmod(hours, 24)
    return f"{days} d {hours} h" if hours else f"{days} d"


_TAILS = {
    ("no_counts", "detector"): "likely a dead detector",
    ("low_volume", "detector"): "likely a detector fault (a dead lane or lost sensitivity)",
    ("high_volume", "detector"): "likely a chattering or double-counting detector",
    ("over_capacity", "detector"): "likely a chattering or double-counting detector",
    ("repeated_value", "detector"): "likely a frozen detector or controller",
    ("no_counts", "traffic"): "neighbouring detectors dropped too, likely a traffic event "
                              "(incident or closure)",
    ("low_volume", "traffic"): "neighbouring detectors dropped too, likely a traffic event "
                               "(incident or closure)",
    ("high_volume", "traffic"): "neighbouring detectors rose too, likely a traffic event",
    ("no_data", "communications"): "other detectors went silent too, likely a communications "
                                   "loss",
    ("repeated_value", "communications"): "others in its group repeated too, likely a "
                                          "controller or polling fault",
}


def summary_sentence(
    episode: Episode,
    cause: str,
    *,
    label: str,
    interval_s: int,
    tz: str | tzinfo | None = None,
) -> str:
    """One sentence describing an episode, short enough for a phone.

    Parameters
    ----------
    episode : Episode
        The episode.
    cause : str
        Its cause, one of ``CAUSES``.
    label : str
        How people name the detector (e.g. "Harbour Rd NB lane 2").
    interval_s : int
        Interval length in seconds.
    tz : str or tzinfo, optional
        The detector's time zone; times are shown in it and called "local". Default UTC.

    Returns
    -------
    str
        E.g. "Harbour Rd NB lane 2: counted 0 vehicles for 25 min (08:05–08:30 local) where
        about 140 were expected — likely a dead detector."
    """
    if cause not in CAUSES:
        raise ValueError(f"unknown cause {cause!r}")
    zone = ZoneInfo(tz) if isinstance(tz, str) else (tz or UTC)
    word = "local" if tz is not None else "UTC"
    start = datetime.fromtimestamp(episode.start_s, zone)
    end_s = episode.end_s + interval_s
    end = datetime.fromtimestamp(end_s, zone)
    dur = _duration(end_s - episode.start_s)
    same_day = start.date() == end.date() or (end - start).total_seconds() <= 12 * 3600
    fmt = "%H:%M" if same_day else "%d %b %H:%M"
    if episode.closed:
        span = f"{start:{fmt}}–{end:{fmt}} {word}"
        how_long = f"for {dur}"
    else:
        span = f"since {start:{fmt}} {word}"
        how_long = f"for {dur} so far"
    obs, exp = episode.observed, episode.expected
    kind = episode.kind
    if kind == "no_counts":
        body = f"counted 0 vehicles {how_long} ({span}) where about {_about(exp)} were expected"
    elif kind == "low_volume":
        share = 100.0 * obs / exp if exp > 0 else 0.0
        body = (f"counted {obs:,.0f} vehicles {how_long} ({span}) where about {_about(exp)} "
                f"were expected ({share:.0f}% of normal)")
    elif kind == "high_volume":
        ratio = obs / exp if exp > 0 else math.inf
        body = (f"counted {obs:,.0f} vehicles {how_long} ({span}) where about {_about(exp)} "
                f"were expected ({ratio:.1f} times normal)")
    elif kind == "over_capacity":
        body = (f"counted {obs:,.0f} vehicles {how_long} ({span}), more than its lanes can "
                "physically carry")
    elif kind == "repeated_value":
        value = obs / episode.n_intervals
        shown = f" ({value:,.0f})" if value == math.floor(value) else ""
        body = f"reported the same count{shown} {episode.n_intervals} intervals in a row ({span})"
    else:  # no_data
        body = f"sent no counts {how_long} ({span})"
    tail = _TAILS.get((kind, cause))
    if tail is None:
        tail = ("cause unclear, compare with neighbouring detectors" if cause == "unknown"
                else f"likely {cause}")
    return f"{label}: {body} — {tail}."
