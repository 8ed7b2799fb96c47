"""RFC 3339 timestamps in and out, and the one UTC-offset helper. Stored times are UTC epoch
seconds.

Interval starts are accepted only inside ``EARLIEST_START_S .. LATEST_START_S`` (1990 up to
2100, UTC): wide enough for any detector history, narrow enough that every local time and
every UTC offset of a stored start stays a valid ``datetime``.
"""

from __future__ import annotations

import re
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

import numpy as np

# re.ASCII: \d is 0-9 only (no full-width or other Unicode digits); \Z: no trailing newline.
_RFC3339 = re.compile(
    r"(?P<base>\d{4}-\d{2}-\d{2}[Tt ]\d{2}:\d{2}:\d{2})(?P<frac>\.\d+)?"
    r"(?P<offset>[Zz]|[+-]\d{2}:\d{2})?\Z",
    re.ASCII,
)
MAX_TIMESTAMP_CHARS = 64  # longer text is not a timestamp; refused before the regex sees it

EARLIEST_START_S = 631_152_000  # 1990-01-01T00:00:00Z
LATEST_START_S = 4_102_444_800  # 2100-01-01T00:00:00Z (exclusive)
START_WINDOW_TEXT = "1990-01-01T00:00:00Z up to (not including) 2100-01-01T00:00:00Z"


def shown(text: str, limit: int = 40) -> str:
    """``repr`` of a client's text cut to ``limit`` characters, safe to put in a message
    (control characters and lone surrogates escaped)."""
    return repr(text) if len(text) <= limit else repr(text[:limit]) + f"... ({len(text):,} characters)"


def parse_rfc3339(text: str) -> int:
    """Epoch seconds of an RFC 3339 timestamp that carries an offset (``Z`` or ``±hh:mm``).

    Raises ``ValueError`` with a message saying what was wrong and what is accepted.
    Fractional seconds are allowed only when zero (interval starts are whole seconds).
    """
    if not isinstance(text, str):
        raise ValueError(f"start must be an RFC 3339 string such as 2026-11-16T08:15:00-06:00, "
                         f"got {type(text).__name__}")
    match = _RFC3339.match(text.strip()) if len(text) <= MAX_TIMESTAMP_CHARS else None
    if match is None:
        raise ValueError(f"start {shown(text)} is not an RFC 3339 date-time; use e.g. "
                         "2026-11-16T08:15:00-06:00 or 2026-11-16T14:15:00Z")
    if match.group("offset") is None:
        raise ValueError(f"start {shown(text)} has no UTC offset; add Z or ±hh:mm, e.g. "
                         "2026-11-16T08:15:00-06:00")
    if match.group("frac") and int(match.group("frac")[1:]) != 0:
        raise ValueError(f"start {shown(text)} has fractional seconds; interval starts are "
                         "whole seconds")
    try:
        moment = datetime.fromisoformat(match.group("base") + match.group("offset").upper())
        return int(moment.timestamp())
    except (ValueError, OverflowError) as exc:
        raise ValueError(f"start {shown(text)} is not a valid date-time ({exc}); use e.g. "
                         "2026-11-16T08:15:00-06:00") from None


def parse_interval_start(text: str) -> int:
    """``parse_rfc3339`` for an interval start, also refused outside the accepted window
    (``EARLIEST_START_S`` .. ``LATEST_START_S``)."""
    start_s = parse_rfc3339(text)
    if not EARLIEST_START_S <= start_s < LATEST_START_S:
        raise ValueError(f"start {shown(text)} is outside the accepted range: interval starts "
                         f"run from {START_WINDOW_TEXT}")
    return start_s


SECONDS_PER_DAY = 86_400
_OFFSET_PROBE_S = 6 * 3600  # zones change offset at most twice a year, never twice in 6 hours
_MAX_OFFSET_SPAN_S = 1000 * 366 * SECONDS_PER_DAY


def utc_offset_s(zone: ZoneInfo, instant_s: int) -> int:
    """UTC offset (seconds, local minus UTC) of ``zone`` in force at ``instant_s`` (epoch s)."""
    offset = datetime.fromtimestamp(instant_s, tz=zone).utcoffset()
    return int(offset.total_seconds()) if offset is not None else 0


def offset_segments(first_s: int, last_s: int, zone: ZoneInfo) -> tuple[np.ndarray, np.ndarray]:
    """UTC instants at which the zone's offset changes, and the offset (s) from each instant on.

    The first segment starts at or before ``first_s``; together the segments cover
    ``[first_s, last_s]``. The offset is probed every 6 hours over the range and each change is
    located to the second by bisection, so zoneinfo is called O(range / 6 h) times, never per
    instant.

    Raises
    ------
    ValueError
        When the range spans over 1000 years (a units mistake).
    """
    if last_s - first_s > _MAX_OFFSET_SPAN_S:
        raise ValueError("interval starts span over 1000 years; check the units (epoch seconds)")
    g0 = first_s - first_s % _OFFSET_PROBE_S
    probes = range(g0, last_s + _OFFSET_PROBE_S, _OFFSET_PROBE_S)
    offsets = [utc_offset_s(zone, t) for t in probes]
    starts, values = [g0], [offsets[0]]
    for i in range(1, len(offsets)):
        if offsets[i] != offsets[i - 1]:
            lo, hi = probes[i - 1], probes[i]  # offset(lo) is old, offset(hi) is new
            while hi - lo > 1:
                mid = (lo + hi) // 2
                if utc_offset_s(zone, mid) == offsets[i - 1]:
                    lo = mid
                else:
                    hi = mid
            starts.append(hi)
            values.append(offsets[i])
    return np.array(starts, dtype=np.int64), np.array(values, dtype=np.int64)


def offsets_from_segments(instants_s: np.ndarray, seg_start: np.ndarray,
                          seg_offset: np.ndarray) -> np.ndarray:
    """UTC offset (s) of each instant (int64 epoch seconds) from :func:`offset_segments`."""
    if seg_start.size == 1:
        return np.broadcast_to(seg_offset[0], instants_s.shape)
    return seg_offset[np.searchsorted(seg_start, instants_s, side="right") - 1]


def utc_offsets_s(start_s: np.ndarray, timezone: str) -> np.ndarray:
    """UTC offset (seconds, local minus UTC) in force at each instant ``start_s`` (epoch s).

    Vectorised: exact to the second at any instant, with O(range / 6 h) zoneinfo calls
    (:func:`offset_segments`).
    """
    start_s = np.asarray(start_s, dtype=np.int64)
    if start_s.size == 0:
        return np.zeros(start_s.shape, dtype=np.int64)
    seg_start, seg_offset = offset_segments(int(start_s.min()), int(start_s.max()),
                                            ZoneInfo(timezone))
    return np.array(offsets_from_segments(start_s, seg_start, seg_offset), dtype=np.int64)


class LocalOffsets:
    """UTC offsets (seconds) of a zone, one instant at a time (:func:`utc_offset_s`), cached per
    15-minute bucket: zone transitions fall on quarter hours, and batches and scoring passes
    share a handful of buckets."""

    def __init__(self, max_entries: int = 200_000) -> None:
        self._zones: dict[str, ZoneInfo] = {}
        self._cache: dict[tuple[str, int], int] = {}
        self._max = max_entries

    def offset(self, tz: str, start_s: int) -> int:
        key = (tz, start_s // 900)
        off = self._cache.get(key)
        if off is None:
            zone = self._zones.get(tz) or self._zones.setdefault(tz, ZoneInfo(tz))
            off = utc_offset_s(zone, start_s)
            if len(self._cache) >= self._max:
                self._cache.clear()
            self._cache[key] = off
        return off


def format_utc(epoch_s: float | int) -> str:
    return datetime.fromtimestamp(int(epoch_s), UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def format_local(epoch_s: float | int, timezone: str) -> str:
    return datetime.fromtimestamp(int(epoch_s), ZoneInfo(timezone)).isoformat()
