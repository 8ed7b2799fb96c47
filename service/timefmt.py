"""RFC 3339 timestamps in and out. Stored times are UTC epoch seconds."""

from __future__ import annotations

import re
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

_RFC3339 = re.compile(
    r"^(?P<base>\d{4}-\d{2}-\d{2}[Tt ]\d{2}:\d{2}:\d{2})(?P<frac>\.\d+)?(?P<offset>[Zz]|[+-]\d{2}:\d{2})?$"
)


def parse_rfc3339(text: str) -> int:
    """Epoch seconds of an RFC 3339 timestamp that carries an offset (``Z`` or ``±hh:mm``).

    Raises ``ValueError`` with a message saying what was wrong and what is accepted.
    Fractional seconds are allowed only when zero (interval starts are whole seconds).
    """
    if not isinstance(text, str):
        raise ValueError(f"start must be an RFC 3339 string such as 2026-11-16T08:15:00-06:00, "
                         f"got {type(text).__name__}")
    match = _RFC3339.match(text.strip())
    if match is None:
        raise ValueError(f"start {text!r} is not an RFC 3339 date-time; use e.g. "
                         "2026-11-16T08:15:00-06:00 or 2026-11-16T14:15:00Z")
    if match.group("offset") is None:
        raise ValueError(f"start {text!r} has no UTC offset; add Z or ±hh:mm, e.g. "
                         "2026-11-16T08:15:00-06:00")
    if match.group("frac") and int(match.group("frac")[1:]) != 0:
        raise ValueError(f"start {text!r} has fractional seconds; interval starts are whole seconds")
    try:
        moment = datetime.fromisoformat(match.group("base") + match.group("offset").upper())
    except ValueError as exc:
        raise ValueError(f"start {text!r} is not a valid date-time ({exc}); use e.g. "
                         "2026-11-16T08:15:00-06:00") from None
    return int(moment.timestamp())


class LocalOffsets:
    """UTC offsets (seconds) of a zone, cached per 15-minute bucket: zone transitions fall on
    quarter hours, and batches and scoring passes share a handful of buckets."""

    def __init__(self, max_entries: int = 200_000) -> None:
        self._zones: dict[str, ZoneInfo] = {}
        self._cache: dict[tuple[str, int], int] = {}
        self._max = max_entries

    def offset(self, tz: str, start_s: int) -> int:
        key = (tz, start_s // 900)
        off = self._cache.get(key)
        if off is None:
            zone = self._zones.get(tz) or self._zones.setdefault(tz, ZoneInfo(tz))
            delta = datetime.fromtimestamp(start_s, UTC).astimezone(zone).utcoffset()
            off = int(delta.total_seconds()) if delta is not None else 0
            if len(self._cache) >= self._max:
                self._cache.clear()
            self._cache[key] = off
        return off


def format_utc(epoch_s: float | int) -> str:
    return datetime.fromtimestamp(int(epoch_s), UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def format_local(epoch_s: float | int, timezone: str) -> str:
    return datetime.fromtimestamp(int(epoch_s), ZoneInfo(timezone)).isoformat()
