"""Specifications of the local-time helpers: the one UTC-offset lookup (service.timefmt) and the
one holiday-calendar check (service.stats.calendar)."""

from __future__ import annotations

from datetime import UTC, datetime
from zoneinfo import ZoneInfo

import numpy as np
import pytest

from service.stats.calendar import local_time_grid, parse_holiday_calendar
from service.timefmt import LocalOffsets, offset_segments, utc_offsets_s

ZONES = ["America/Chicago", "Europe/London", "Australia/Lord_Howe", "Asia/Kathmandu", "UTC"]


def _zoneinfo_offsets(start_s: np.ndarray, timezone: str) -> np.ndarray:
    zone = ZoneInfo(timezone)
    return np.array([int(datetime.fromtimestamp(int(s), UTC).astimezone(zone)
                         .utcoffset().total_seconds()) for s in start_s])


@pytest.mark.parametrize("timezone", ZONES)
def test_utc_offsets_match_zoneinfo_at_every_minute_of_a_year(timezone):
    """The vectorised offsets equal zoneinfo's at every minute of 2026, DST changes included."""
    start = int(datetime(2026, 1, 1, tzinfo=UTC).timestamp())
    minutes = start + 60 * np.arange(0, 366 * 1440, 7, dtype=np.int64)  # every 7th minute
    np.testing.assert_array_equal(utc_offsets_s(minutes, timezone),
                                  _zoneinfo_offsets(minutes, timezone))


def test_offset_segments_locate_each_change_to_the_second():
    """Chicago 2026: offsets change at 2026-03-08T08:00Z and 2026-11-01T07:00Z exactly."""
    first = int(datetime(2026, 1, 1, tzinfo=UTC).timestamp())
    last = int(datetime(2026, 12, 31, tzinfo=UTC).timestamp())
    starts, offsets = offset_segments(first, last, ZoneInfo("America/Chicago"))
    assert starts[1:].tolist() == [int(datetime(2026, 3, 8, 8, tzinfo=UTC).timestamp()),
                                   int(datetime(2026, 11, 1, 7, tzinfo=UTC).timestamp())]
    assert offsets.tolist() == [-6 * 3600, -5 * 3600, -6 * 3600]


def test_utc_offsets_keep_shape_and_accept_empty_input():
    """Offsets come back in the shape of the instants, also for no instants at all."""
    assert utc_offsets_s(np.zeros(0, dtype=np.int64), "America/Chicago").shape == (0,)
    grid = np.array([[0, 86_400], [1_800_000_000, 1_800_003_600]])
    assert utc_offsets_s(grid, "America/Chicago").shape == (2, 2)


def test_local_offsets_agree_with_vectorised_offsets():
    """The cached one-at-a-time lookup gives the vectorised offsets, instant by instant."""
    cache = LocalOffsets()
    instants = int(datetime(2026, 10, 31, tzinfo=UTC).timestamp()) + 900 * np.arange(300)
    vector = utc_offsets_s(instants, "America/Chicago")
    assert [cache.offset("America/Chicago", int(s)) for s in instants] == vector.tolist()


def test_offsets_refuse_a_span_over_a_thousand_years():
    """Milliseconds passed as seconds are refused with a message naming the units."""
    with pytest.raises(ValueError, match="epoch seconds"):
        utc_offsets_s(np.array([0, 1_800_000_000_000 * 20]), "UTC")


@pytest.mark.parametrize(("code", "key"), [
    (None, None), ("US", ("US", None)), ("us", ("US", None)), ("US-CO", ("US", "CO")),
    (" DE ", ("DE", None)),
])
def test_parse_holiday_calendar_accepts_known_codes(code, key):
    """Country[-subdivision] codes the holidays package knows; the country in any case."""
    assert parse_holiday_calendar(code) == key


@pytest.mark.parametrize("code", ["XX", "US-ZZ", "", "  ", "-CO"])
def test_parse_holiday_calendar_rejects_unknown_codes_saying_what_is_accepted(code):
    """An unknown or empty code is a ValueError that shows the accepted form."""
    with pytest.raises(ValueError, match="'US' or 'US-CO'"):
        parse_holiday_calendar(code)


def test_a_calendar_accepted_by_the_check_is_one_the_time_grid_uses():
    """What the check accepts, the time grid accepts: 2026-07-03 (observed holiday) is one."""
    start = int(datetime(2026, 7, 3, 12, tzinfo=UTC).timestamp())
    grid = local_time_grid([start], interval_s=300, timezone="America/Chicago",
                           holiday_calendar="us")
    assert grid.day_type.tolist() == [2]
