"""Range partitions of ``counts`` by ``start_s`` on PostgreSQL (declarative partitioning).

Migration 0008 makes ``counts`` a partitioned table with a default partition
(``counts_default``) that catches any interval no range partition covers, so ingest never
fails for want of a partition. Maintenance (``service.pipeline.retention``) creates range
partitions ahead of the clock, moves whatever landed in the default partition into range
partitions of its own, and drops whole partitions once their intervals expire: no long delete.

Ranges are UTC-aligned multiples of ``span_s`` (``partition_days``); a partition is named by
the UTC date its range starts on, ``counts_pYYYYMMDD``. SQLite keeps one plain table: every
function here is a no-op there (``is_partitioned`` is False).

Creating or attaching a partition takes a brief lock on ``counts`` (PostgreSQL checks that
the default partition holds no row of the new range), which is why partitions are made ahead
of time, when the default partition is empty, and not as data arrives.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import UTC, datetime

from sqlalchemy import Connection, text

DEFAULT_PARTITION = "counts_default"
_BOUND = re.compile(r"FROM \('?(-?\d+)'?\) TO \('?(-?\d+)'?\)")


@dataclass(frozen=True)
class Partition:
    name: str
    lo_s: int  # first start_s held (epoch s, inclusive)
    hi_s: int  # end of the range (epoch s, exclusive)


def is_partitioned(conn: Connection) -> bool:
    """True when ``counts`` is a partitioned table (PostgreSQL after migration 0008)."""
    if conn.dialect.name != "postgresql":
        return False
    kind = conn.execute(text(
        "SELECT c.relkind FROM pg_class c JOIN pg_namespace n ON n.oid = c.relnamespace "
        "WHERE c.relname = 'counts' AND n.nspname = current_schema()")).scalar()
    return kind == "p"


def partitions(conn: Connection) -> list[Partition]:
    """The range partitions of ``counts`` in time order (the default partition left out)."""
    rows = conn.execute(text(
        "SELECT c.relname, pg_get_expr(c.relpartbound, c.oid) AS bound FROM pg_inherits i "
        "JOIN pg_class c ON c.oid = i.inhrelid WHERE i.inhparent = 'counts'::regclass")).all()
    out = []
    for name, bound in rows:
        m = _BOUND.search(bound or "")
        if m:
            out.append(Partition(name, int(m.group(1)), int(m.group(2))))
    return sorted(out, key=lambda p: p.lo_s)


def partition_name(lo_s: int) -> str:
    return "counts_p" + datetime.fromtimestamp(lo_s, UTC).strftime("%Y%m%d")


def ranges_covering(lo_s: int, hi_s: int, span_s: int) -> list[tuple[int, int]]:
    """The UTC-aligned ``span_s`` ranges that together cover [lo_s, hi_s)."""
    first = lo_s - lo_s % span_s
    return [(t, t + span_s) for t in range(first, hi_s, span_s)] if hi_s > lo_s else []


def default_span(conn: Connection) -> tuple[int, int] | None:
    """[first start_s, last start_s + 1) of the rows in the default partition, if any."""
    row = conn.execute(text(
        f"SELECT min(start_s), max(start_s) FROM {DEFAULT_PARTITION}")).one()
    return None if row[0] is None else (int(row[0]), int(row[1]) + 1)


LOCK_WAIT_MS = 5000  # longest wait for the exclusive lock on counts (ms); ingest queues behind it


def lock_counts(conn: Connection) -> None:
    """Lock ``counts`` exclusively, parent first (``LOCK TABLE`` then takes every partition),
    for the rest of the transaction; wait at most ``LOCK_WAIT_MS`` (then
    ``sqlalchemy.exc.OperationalError``, lock not available).

    Every query takes the parent before its partitions. ``CREATE TABLE ... PARTITION OF`` or
    ``DETACH PARTITION`` after a read of a partition in the same transaction would take them
    the other way round, and deadlock with ingest and the scorers' reads (seen with two
    workers starting beside a feeding API); and without the lock, counts stored into the
    default partition between moving its rows out and ``ATTACH PARTITION`` make the attach
    fail (tests/store/test_retention.py)."""
    conn.execute(text(f"SET LOCAL lock_timeout = {LOCK_WAIT_MS}"))
    conn.execute(text("LOCK TABLE counts IN ACCESS EXCLUSIVE MODE"))


def missing_ranges(conn: Connection, lo_s: int, hi_s: int, *, span_s: int
                   ) -> list[tuple[int, int]]:
    """The ranges of [lo_s, hi_s) that no partition covers yet (no lock taken)."""
    existing = partitions(conn)
    return [(lo, hi) for lo, hi in ranges_covering(lo_s, hi_s, span_s)
            if not any(p.lo_s < hi and lo < p.hi_s for p in existing)]


def ensure_partitions(conn: Connection, lo_s: int, hi_s: int, *, span_s: int) -> list[str]:
    """Create the range partitions that cover [lo_s, hi_s) and do not exist yet, moving any
    rows of their ranges out of the default partition; the names created. Call it after
    ``lock_counts`` in the same transaction.

    Ranges already covered by a partition of another span are left alone."""
    existing = partitions(conn)
    created = []
    for lo, hi in ranges_covering(lo_s, hi_s, span_s):
        if any(p.lo_s < hi and lo < p.hi_s for p in existing):
            continue
        name = partition_name(lo)
        moved = conn.execute(text(
            f"SELECT 1 FROM {DEFAULT_PARTITION} WHERE start_s >= :lo AND start_s < :hi LIMIT 1"),
            {"lo": lo, "hi": hi}).first()
        if moved is None:
            conn.execute(text(
                f"CREATE TABLE {name} PARTITION OF counts FOR VALUES FROM ({lo}) TO ({hi})"))
        else:
            # Rows of this range wait in the default partition: copy them into a table of the
            # partition's shape, remove them from the default, then attach (the CHECK lets
            # PostgreSQL skip scanning the new table).
            conn.execute(text(f"CREATE TABLE {name} (LIKE counts INCLUDING DEFAULTS, "
                              f"CONSTRAINT ck_{name}_range CHECK (start_s >= {lo} AND "
                              f"start_s < {hi}))"))
            conn.execute(text(f"INSERT INTO {name} SELECT * FROM {DEFAULT_PARTITION} "
                              "WHERE start_s >= :lo AND start_s < :hi"), {"lo": lo, "hi": hi})
            conn.execute(text(f"DELETE FROM {DEFAULT_PARTITION} "
                              "WHERE start_s >= :lo AND start_s < :hi"), {"lo": lo, "hi": hi})
            conn.execute(text(
                f"ALTER TABLE counts ATTACH PARTITION {name} FOR VALUES FROM ({lo}) TO ({hi})"))
            conn.execute(text(f"ALTER TABLE {name} DROP CONSTRAINT ck_{name}_range"))
        existing.append(Partition(name, lo, hi))
        created.append(name)
    return created


def drop_partition(conn: Connection, part: Partition) -> None:
    """Drop a whole range partition (its rows go with it, without a row-by-row delete)."""
    conn.execute(text(f"ALTER TABLE counts DETACH PARTITION {part.name}"))
    conn.execute(text(f"DROP TABLE {part.name}"))
