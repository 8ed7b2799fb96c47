"""Reads behind the web view (``service.web.ui``): the network's state per detector, the alert
list with its filters, one detector's counts and alerts over a span, and the sign-in look-ups.

Every function is one short read transaction; the per-detector figures of the network page read
only the last 24 h of counts (index look-ups on SQLite, one grouped pass over the partitions
holding them on PostgreSQL).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from sqlalchemy import ColumnElement, Connection, Engine, and_, func, select, text

from service.config import Settings
from service.store import tables
from service.store.alerts import _intervals, _step, alert_public
from service.store.engine import read_transaction
from service.store.keys import Principal, hash_key
from service.store.scoring import clock_now

DAY_S = 86_400  # seconds
# Detector states shown by the web view (our own names): what an operator needs first.
STATES = ("reporting", "alerting", "silent", "learning")


@dataclass(frozen=True)
class NetworkRow:
    """One detector on the network page."""

    detector_id: str
    label: str | None
    group: str | None
    road_class: str
    lanes: int
    interval_s: int
    timezone: str
    lon: float | None
    lat: float | None
    last_start_s: int | None  # start of the latest stored interval (UTC epoch s)
    open_alerts: int
    open_kinds: tuple[str, ...]
    completeness_24h: float  # share of the last 24 h's intervals stored, 0..1
    has_baseline: bool
    state: str  # one of STATES


def _state(*, last_start_s: int | None, interval_s: int, now_s: float, grace_s: int,
           kinds: tuple[str, ...], has_baseline: bool) -> str:
    """``silent``: nothing stored within an interval plus the grace (or a no_reports alert
    open); ``alerting``: any other open alert; ``learning``: no baseline fitted yet."""
    if "no_reports" in kinds or last_start_s is None or (
            now_s - (last_start_s + interval_s) > grace_s + interval_s):
        return "silent"
    if kinds:
        return "alerting"
    if not has_baseline:
        return "learning"
    return "reporting"


def network(engine: Engine, settings: Settings) -> tuple[float, list[NetworkRow]]:
    """(the scoring clock in epoch s, every detector with its state), in detector id order."""
    d, a, b = tables.detectors, tables.alerts, tables.baselines
    with read_transaction(engine) as conn:
        now = clock_now(conn, settings)
        # Integer bounds: start_s < ceil(now) is start_s < now for whole seconds, and a float
        # bound would make PostgreSQL compare start_s as numeric (no index, no pruning).
        lo, hi = int(now) - DAY_S, math.ceil(now)
        rows = conn.execute(select(d.c.detector_id, d.c.label, d.c.group_id, d.c.road_class,
                                   d.c.lanes, d.c.interval_s, d.c.timezone, d.c.lon, d.c.lat)
                            .order_by(d.c.detector_id)).all()
        if conn.dialect.name == "postgresql":
            latest, present = _recent_counts_grouped(conn, [r[0] for r in rows],
                                                     lo_s=lo, hi_s=hi)
        else:
            latest, present = _recent_counts_per_detector(conn, lo_s=lo, hi_s=hi)
        kinds: dict[str, list[str]] = {}
        for det, kind in conn.execute(select(a.c.detector_id, a.c.kind).where(
                a.c.status == "open", a.c.withdrawn == 0, a.c.detector_id.is_not(None))):
            kinds.setdefault(det, []).append(kind)
        fitted = {r[0] for r in conn.execute(select(b.c.detector_id).distinct())}
    out = []
    # Rows unpacked as tuples: reading a Row's fields by name costs more than the rest here.
    for det, label, group, road_class, lanes, interval_s, timezone, lon, lat in rows:
        det_kinds = kinds.get(det, ())
        open_kinds = tuple(sorted(set(det_kinds)))
        has_baseline = det in fitted
        last_start_s = latest.get(det)
        out.append(NetworkRow(
            det, label, group, road_class, lanes, interval_s, timezone, lon, lat, last_start_s,
            len(det_kinds), open_kinds, min(1.0, present.get(det, 0) / (DAY_S // interval_s)),
            has_baseline,
            _state(last_start_s=last_start_s, interval_s=interval_s, now_s=now,
                   grace_s=settings.missing_grace_s, kinds=open_kinds,
                   has_baseline=has_baseline)))
    return now, out


def _recent_counts_per_detector(conn: Connection, *, lo_s: int, hi_s: int
                                ) -> tuple[dict[str, int], dict[str, int]]:
    """({detector: latest start_s}, {detector: intervals stored in [lo_s, hi_s)}), per detector
    on the counts primary key (detector_id, start_s): one index seek for the latest start and
    one index range for the window. SQLite's plan: its primary key index covers both."""
    d, c = tables.detectors, tables.counts
    last = select(func.max(c.c.start_s)).where(c.c.detector_id == d.c.detector_id
                                               ).scalar_subquery()
    in_day = select(func.count()).select_from(c).where(
        c.c.detector_id == d.c.detector_id, c.c.start_s >= lo_s, c.c.start_s < hi_s
    ).scalar_subquery()
    latest: dict[str, int] = {}
    present: dict[str, int] = {}
    for det, last_s, n in conn.execute(select(d.c.detector_id, last, in_day)):
        if last_s is not None:
            latest[det] = int(last_s)
        present[det] = int(n or 0)
    return latest, present


def _recent_counts_grouped(conn: Connection, detector_ids: list[str], *, lo_s: int, hi_s: int
                           ) -> tuple[dict[str, int], dict[str, int]]:
    """The same figures in one pass over the intervals since ``lo_s`` (PostgreSQL's plan).

    Per-detector subqueries cost PostgreSQL a heap visit per stored interval (a detector's
    intervals lie one to a page, in arrival order, and the last day's pages are rarely marked
    all-visible yet) and, unbounded, an index seek into every partition. Grouping the rows
    since ``lo_s`` reads only the partitions holding them, in heap order. The latest start of a
    detector with nothing since ``lo_s`` is looked up for those detectors alone."""
    c = tables.counts
    latest: dict[str, int] = {}
    present: dict[str, int] = {}
    # A large window's cost estimate can pass jit_above_cost: compiling took 90 ms of the old
    # per-detector plan on the 5,000-detector bench, more than this read gains from it.
    conn.execute(text("SET LOCAL jit = off"))
    for det, last_s, n in conn.execute(
            select(c.c.detector_id, func.max(c.c.start_s),
                   func.count().filter(c.c.start_s < hi_s))
            .where(c.c.start_s >= lo_s).group_by(c.c.detector_id)):
        latest[det], present[det] = int(last_s), int(n)
    quiet = [det for det in detector_ids if det not in latest]
    for lo in range(0, len(quiet), 1000):
        for det, last_s in conn.execute(
                select(c.c.detector_id, func.max(c.c.start_s))
                .where(c.c.detector_id.in_(quiet[lo:lo + 1000])).group_by(c.c.detector_id)):
            latest[det] = int(last_s)
    return latest, present


def alert_list(engine: Engine, *, status: str, kind: str | None, cause: str | None,
               group: str | None, limit: int) -> tuple[int, list[dict[str, Any]], int]:
    """(the highest alert seq committed, the ``limit`` latest-starting alerts matching the
    filters in their public shape, how many match in all). Group members' shares are hidden,
    and so are alerts raised while their detector was out of service (as GET /v1/alerts
    without ``suppressed=true`` and the seq feed of the page's live updates)."""
    a = tables.alerts
    cond: list[ColumnElement[bool]] = [a.c.part_of.is_(None), a.c.suppressed == 0]
    if status != "any":
        cond.append(a.c.status == status)
    if kind is not None:
        cond.append(a.c.kind == kind)
    if cause is not None:
        cond.append(a.c.cause == cause)
    if group is not None:
        cond.append(a.c.group_id == group)
    with read_transaction(engine) as conn:
        high = conn.execute(select(tables.counters.c.value)
                            .where(tables.counters.c.name == "alert_seq")).scalar_one()
        total = conn.execute(select(func.count()).select_from(a).where(and_(*cond))).scalar_one()
        rows = conn.execute(select(a).where(and_(*cond))
                            .order_by(a.c.start_s.desc(), a.c.alert_id.desc()).limit(limit)).all()
        intervals = _intervals(conn, rows) if rows else {}
    return int(high), [alert_public(r, _step(r, intervals)) for r in rows], int(total)


def alert_detector_zones(engine: Engine, detector_ids: set[str]) -> dict[str, str]:
    """The time zone of each of ``detector_ids`` (to show an alert's start in local time)."""
    if not detector_ids:
        return {}
    d = tables.detectors
    with read_transaction(engine) as conn:
        return dict(conn.execute(select(d.c.detector_id, d.c.timezone)
                                 .where(d.c.detector_id.in_(sorted(detector_ids)))).all())


def groups_and_zones(engine: Engine) -> tuple[list[str], dict[str, str]]:
    """(every group id, in order; each group's time zone, from its first detector)."""
    d = tables.detectors
    with read_transaction(engine) as conn:
        rows = conn.execute(select(d.c.group_id, d.c.timezone).where(d.c.group_id.is_not(None))
                            .order_by(d.c.group_id, d.c.detector_id)).all()
    zones: dict[str, str] = {}
    for g, tz in rows:
        zones.setdefault(g, tz)
    return sorted(zones), zones


def day_counts(engine: Engine, detector_id: str, *, lo_s: int, hi_s: int
               ) -> list[tuple[int, int]]:
    """(start epoch s, count) of one detector's stored intervals in ``[lo_s, hi_s)``."""
    c = tables.counts
    with read_transaction(engine) as conn:
        rows = conn.execute(select(c.c.start_s, c.c.count).where(
            c.c.detector_id == detector_id, c.c.start_s >= lo_s, c.c.start_s < hi_s)
            .order_by(c.c.start_s)).all()
    return [(int(s), int(n)) for s, n in rows]


def detector_alerts(engine: Engine, detector_id: str, *, lo_s: int | None = None,
                    hi_s: int | None = None, limit: int = 50) -> list[dict[str, Any]]:
    """A detector's alerts (its own and the group alerts it is a member of are not mixed: its
    own only), newest first; with ``lo_s``/``hi_s`` only those overlapping ``[lo_s, hi_s)``."""
    a = tables.alerts
    cond: list[ColumnElement[bool]] = [a.c.detector_id == detector_id, a.c.withdrawn == 0]
    if lo_s is not None:
        cond.append(a.c.end_s >= lo_s)
    if hi_s is not None:
        cond.append(a.c.start_s < hi_s)
    with read_transaction(engine) as conn:
        rows = conn.execute(select(a).where(and_(*cond))
                            .order_by(a.c.start_s.desc()).limit(limit)).all()
        intervals = _intervals(conn, rows) if rows else {}
    out = []
    for r in rows:
        item = alert_public(r, _step(r, intervals))
        item["start_s"], item["end_s"] = int(r.start_s), int(r.end_s) + (_step(r, intervals) or 0)
        out.append(item)
    return out


# ---------------------------------------------------------------------------- sign-in look-ups


def key_for_sign_in(engine: Engine, presented: str) -> tuple[int, Principal] | None:
    """(key id, principal) of an active API key, or None when it is unknown or revoked."""
    k = tables.api_keys
    with read_transaction(engine) as conn:
        row = conn.execute(select(k.c.key_id, k.c.name, k.c.role).where(
            k.c.key_hash == hash_key(presented), k.c.revoked_s.is_(None))).first()
    return None if row is None else (int(row.key_id), Principal(row.name, row.role))


def session_principal(engine: Engine, key_id: int) -> Principal | None:
    """The principal of key ``key_id`` while it is not revoked (a session ends with its key)."""
    k = tables.api_keys
    with read_transaction(engine) as conn:
        row = conn.execute(select(k.c.name, k.c.role).where(
            k.c.key_id == key_id, k.c.revoked_s.is_(None))).first()
    return None if row is None else Principal(row.name, row.role)


def scoring_clock(engine: Engine, settings: Settings) -> float:
    """The scoring clock now (epoch s): wall time, or the latest interval in data-clock mode."""
    with read_transaction(engine) as conn:
        return clock_now(conn, settings)
