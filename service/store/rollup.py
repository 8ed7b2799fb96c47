"""Hourly totals (``count_hours``) from the raw intervals, and expiry of raw intervals.

An hour's row holds the vehicles counted in intervals starting in that UTC hour, how many
intervals were reported, and how many of the detector's scored intervals in it were flagged
(distinct starts in ``evidence``; for 20 and 30 s detectors these are 5-minute windows). The
totals are exact sums of the stored intervals, computed by the database.

Keeping them exact across expiry: maintenance recomputes recent hours from the raw rows
(``replace_hours``), and an hour's raw rows are removed only in the transaction that
recomputes that hour from them (``expire_range``). Should an interval arrive for an hour whose
raw rows already expired, its values are *added* to the stored total when it expires in turn:
the watermark ``counters.raw_expired_before_s`` says which hours were finalized.

Hours are UTC hours (``start_s - start_s % 3600``): the same as local hours wherever the UTC
offset is a whole number of hours.
"""

from __future__ import annotations

from sqlalchemy import Connection, text

HOUR_S = 3600
WATERMARK = "raw_expired_before_s"

# Vehicles and reported intervals from counts, flagged starts from evidence, per detector-hour.
_AGGREGATE = """
SELECT detector_id, hour_s, SUM(volume) AS volume, SUM(intervals) AS intervals,
       SUM(flagged) AS flagged FROM (
  SELECT detector_id, start_s - start_s % 3600 AS hour_s, SUM(count) AS volume,
         COUNT(*) AS intervals, 0 AS flagged
  FROM counts WHERE start_s >= :lo AND start_s < :hi
  GROUP BY detector_id, start_s - start_s % 3600
  UNION ALL
  SELECT detector_id, start_s - start_s % 3600 AS hour_s, 0, 0, COUNT(DISTINCT start_s)
  FROM evidence WHERE start_s >= :lo AND start_s < :hi
  GROUP BY detector_id, start_s - start_s % 3600
) AS parts GROUP BY detector_id, hour_s
"""


def floor_hour(t: float) -> int:
    return int(t) - int(t) % HOUR_S


def watermark(conn: Connection) -> int:
    """Hours before this (epoch s) had their raw intervals expired."""
    value = conn.execute(text("SELECT value FROM counters WHERE name = :n"),
                         {"n": WATERMARK}).scalar()
    return int(value) if value is not None else 0


def _raise_watermark(conn: Connection, hi_s: int) -> None:
    conn.execute(text(
        "INSERT INTO counters (name, value) VALUES (:n, :v) ON CONFLICT (name) DO UPDATE SET "
        "value = CASE WHEN counters.value > excluded.value THEN counters.value "
        "ELSE excluded.value END"), {"n": WATERMARK, "v": hi_s})


def replace_hours(conn: Connection, lo_s: int, hi_s: int) -> int:
    """Recompute the hourly totals of [lo_s, hi_s) (hour-aligned) from the raw intervals;
    the number of detector-hours written."""
    conn.execute(text("DELETE FROM count_hours WHERE hour_s >= :lo AND hour_s < :hi"),
                 {"lo": lo_s, "hi": hi_s})
    result = conn.execute(text(
        "INSERT INTO count_hours (detector_id, hour_s, volume, intervals, flagged) "
        + _AGGREGATE), {"lo": lo_s, "hi": hi_s})
    return int(result.rowcount or 0)


def _add_hours(conn: Connection, lo_s: int, hi_s: int) -> None:
    """Add the raw intervals of [lo_s, hi_s) to hours whose earlier rows already expired."""
    conn.execute(text(
        "INSERT INTO count_hours (detector_id, hour_s, volume, intervals, flagged) "
        + _AGGREGATE + " ON CONFLICT (detector_id, hour_s) DO UPDATE SET "
        "volume = count_hours.volume + excluded.volume, "
        "intervals = count_hours.intervals + excluded.intervals, flagged = excluded.flagged"),
        {"lo": lo_s, "hi": hi_s})


def finalize_hours(conn: Connection, lo_s: int, hi_s: int) -> None:
    """Hourly totals of [lo_s, hi_s) made final from the raw rows about to be removed (call in
    the transaction that removes them): replaced where no row expired before, added to where
    some did; the watermark then covers the range."""
    mark = watermark(conn)
    if lo_s < mark:
        _add_hours(conn, lo_s, min(hi_s, mark))
    if hi_s > mark:
        replace_hours(conn, max(lo_s, mark), hi_s)
    _raise_watermark(conn, hi_s)


def delete_counts(conn: Connection, lo_s: int, hi_s: int) -> int:
    """Delete the raw intervals of [lo_s, hi_s); rows deleted."""
    result = conn.execute(text("DELETE FROM counts WHERE start_s >= :lo AND start_s < :hi"),
                          {"lo": lo_s, "hi": hi_s})
    return int(result.rowcount or 0)


def oldest_start(conn: Connection, before_s: int | None = None) -> int | None:
    """The earliest stored interval start (before ``before_s`` when given)."""
    if before_s is None:
        value = conn.execute(text("SELECT min(start_s) FROM counts")).scalar()
    else:
        value = conn.execute(text("SELECT min(start_s) FROM counts WHERE start_s < :t"),
                             {"t": before_s}).scalar()
    return None if value is None else int(value)


def rows_between(conn: Connection, lo_s: int, hi_s: int) -> int:
    return int(conn.execute(text(
        "SELECT count(*) FROM counts WHERE start_s >= :lo AND start_s < :hi"),
        {"lo": lo_s, "hi": hi_s}).scalar_one())
