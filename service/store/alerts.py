"""Alert reads and writes for the API: the change feed polled by dashboards (with its ETag),
one alert with its history, acknowledgements (and their withdrawal) and notes, and a
detector's 24 h / 7 day health figures.

An alert's history (``alert_history``) is appended to, never changed: each acknowledgement,
withdrawal of one and note is an entry (action, by, at, note, and the API key that made it).
The alert row keeps the acknowledgement in force (the latest one, unless withdrawn since).

Rows are returned in their public shape (times as RFC 3339, ``p_value`` and ``score`` from
``log_p``). The alert sequence (``counters.alert_seq``) rises on every change of an alert, so
a poller that asks for ``seq > after`` sees each change once.
"""

from __future__ import annotations

import hashlib
import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import orjson
from sqlalchemy import Connection, Engine, Select, func, select, update

from service.domain import scoring_interval_s
from service.errors import NotFound, ValidationFailed
from service.store import tables
from service.store.engine import read_transaction, write_transaction
from service.timefmt import format_utc

LN10 = math.log(10.0)
HEALTH_WINDOWS_S = (("last_24h", 86_400), ("last_7d", 7 * 86_400))  # seconds


def next_seqs(conn: Connection, n: int) -> list[int]:
    """Draw ``n`` alert sequence numbers; the counter row stays locked until commit."""
    c = tables.counters
    top = conn.execute(update(c).where(c.c.name == "alert_seq").values(value=c.c.value + n)
                       .returning(c.c.value)).scalar_one()
    return list(range(top - n + 1, top + 1))


def alert_public(row: Any, interval_s: int | None) -> dict[str, Any]:
    """An ``alerts`` row in its public shape; ``interval_s`` gives the end of its last interval."""
    m = row._mapping
    log_p = m["log_p"]
    ack = None
    if m["acknowledged_by"] is not None:
        ack = {"by": m["acknowledged_by"], "at": format_utc(m["acknowledged_s"]),
               "note": m["ack_note"]}
    step = interval_s or 0
    return {
        "id": m["alert_id"], "seq": m["seq"], "detector_id": m["detector_id"],
        "group": m["group_id"], "kind": m["kind"], "cause": m["cause"], "status": m["status"],
        "withdrawn": bool(m["withdrawn"]),
        "start": format_utc(m["start_s"]), "end": format_utc(m["end_s"] + step),
        "closed_at": format_utc(m["closed_s"]) if m["closed_s"] is not None else None,
        "intervals": m["n_intervals"],
        "observed": m["observed"], "expected": None if m["expected"] is None else round(m["expected"], 1),
        "p_value": math.exp(log_p) if log_p is not None else None,
        "score": round(-log_p / LN10, 2) if log_p is not None else None,
        "baseline_id": m["baseline_id"], "summary": m["summary"],
        "detectors": orjson.loads(m["detectors"]) if m["detectors"] else None,
        "acknowledged": ack,
        "suppressed": bool(m["suppressed"]),
    }


def _intervals(conn: Connection, rows: Any) -> dict[str, int]:
    """The scoring interval (window sums for short intervals) of the detectors ``rows`` (alert
    rows) name: read for those only, not for the whole network on every poll."""
    d = tables.detectors
    ids: set[str] = set()
    for r in rows:
        if r.detector_id is not None:
            ids.add(r.detector_id)
        if r.detectors:
            ids.update(orjson.loads(r.detectors))
    out: dict[str, int] = {}
    wanted = sorted(ids)
    for i in range(0, len(wanted), 500):
        q = select(d.c.detector_id, d.c.interval_s).where(d.c.detector_id.in_(wanted[i:i + 500]))
        out.update({r.detector_id: scoring_interval_s(r.interval_s) for r in conn.execute(q)})
    return out


def _group_step(row: Any, intervals: dict[str, int]) -> int | None:
    members = orjson.loads(row.detectors) if row.detectors else []
    steps = [intervals[m] for m in members if m in intervals]
    return min(steps) if steps else None


def _step(row: Any, intervals: dict[str, int]) -> int | None:
    return intervals.get(row.detector_id) or _group_step(row, intervals)


def _require_detector(conn: Connection, detector_id: str) -> None:
    d = tables.detectors
    if conn.execute(select(d.c.detector_id).where(d.c.detector_id == detector_id)).first() is None:
        raise NotFound(f"unknown detector {detector_id!r}")


@dataclass(frozen=True)
class Poll:
    """One poll of the change feed: ``page`` is None when the poller's ETag still holds."""

    etag: str
    page: dict[str, Any] | None


def poll_query(*, after: int, status: str = "any", detector_id: str | None = None,
               group: str | None = None, kind: str | None = None, limit: int = 100,
               start_after_s: int | None = None, start_before_s: int | None = None,
               suppressed: bool = False) -> Select[Any]:
    """The page of a poll: alert rows with ``seq > after`` and the filters, in seq order."""
    a = tables.alerts
    q = select(a).where(a.c.seq > after, a.c.part_of.is_(None))
    if status != "any":
        q = q.where(a.c.status == status)
    if detector_id is not None:
        q = q.where(a.c.detector_id == detector_id)
    if group is not None:
        q = q.where(a.c.group_id == group)
    if kind is not None:
        q = q.where(a.c.kind == kind)
    if not suppressed:
        q = q.where(a.c.suppressed == 0)
    if start_after_s is not None:
        q = q.where(a.c.start_s >= start_after_s)
    if start_before_s is not None:
        q = q.where(a.c.start_s < start_before_s)
    return q.order_by(a.c.seq).limit(limit)


def poll(engine: Engine, *, after: int, status: str, detector_id: str | None, group: str | None,
         kind: str | None, limit: int, query: str, if_none_match: str | None,
         start_after_s: int | None = None, start_before_s: int | None = None,
         suppressed: bool = False) -> Poll:
    """Alert changes with ``seq > after`` in seq order (group members' shares hidden, and
    suppressed alerts unless ``suppressed``), optionally only alerts starting in
    [``start_after_s``, ``start_before_s``).

    The ETag is the highest committed seq with the request's ``query`` string: it changes when
    any alert changes, and differs between filters."""
    with read_transaction(engine) as conn:
        if detector_id is not None:
            _require_detector(conn, detector_id)
        high = conn.execute(select(tables.counters.c.value)
                            .where(tables.counters.c.name == "alert_seq")).scalar_one()
        tag = hashlib.sha1(f"{high}|{query}".encode()).hexdigest()[:20]
        etag = f'"{tag}"'
        if if_none_match == etag:
            return Poll(etag, None)
        if conn.dialect.name == "postgresql":
            # Planned for this poll's own values: a generic plan of the prepared statement
            # cannot tell a rare kind or status from a common one, and walks the seq index
            # from ``after`` on instead of the (kind, seq) or (status, seq) index (0009).
            conn.exec_driver_sql("SET LOCAL plan_cache_mode = force_custom_plan")
        rows = conn.execute(poll_query(
            after=after, status=status, detector_id=detector_id, group=group, kind=kind,
            limit=limit, start_after_s=start_after_s, start_before_s=start_before_s,
            suppressed=suppressed)).all()
        intervals = _intervals(conn, rows) if rows else {}
    data = [alert_public(r, _step(r, intervals)) for r in rows]
    # With filters, rows skipped between seqs are not this poller's business: it may jump to
    # the highest seq committed when the page is not full.
    next_after = data[-1]["seq"] if len(data) == limit else max(after, high if not data else
                                                                  max(data[-1]["seq"], high))
    return Poll(etag, {"data": data, "next_after": next_after})


def _history(conn: Connection, alert_id: int) -> list[dict[str, Any]]:
    h = tables.alert_history
    return [{"action": r.action, "by": r.actor, "at": format_utc(r.at_s), "note": r.note,
             "key": r.key_name}
            for r in conn.execute(select(h).where(h.c.alert_id == alert_id)
                                  .order_by(h.c.entry_id))]


def _get(conn: Connection, alert_id: int) -> dict[str, Any]:
    a = tables.alerts
    row = conn.execute(select(a).where(a.c.alert_id == alert_id)).first()
    if row is None:
        raise NotFound(f"unknown alert {alert_id}")
    return {**alert_public(row, _step(row, _intervals(conn, [row]))),
            "history": _history(conn, alert_id)}


def get_alert(engine: Engine, alert_id: int) -> dict[str, Any]:
    """One alert in its public shape, with its history; ``NotFound`` if there is none."""
    with read_transaction(engine) as conn:
        return _get(conn, alert_id)


def _append(conn: Connection, alert_id: int, *, action: str, by: str, note: str | None,
            key_name: str | None, now: float, **alert_values: Any) -> None:
    """One history entry, and the alert's change (a new seq, so pollers see it)."""
    a = tables.alerts
    conn.execute(tables.alert_history.insert().values(
        alert_id=alert_id, action=action, actor=by, key_name=key_name, at_s=now, note=note))
    (seq,) = next_seqs(conn, 1)
    conn.execute(a.update().where(a.c.alert_id == alert_id).values(
        seq=seq, updated_s=now, **alert_values))


def _current_ack(conn: Connection, alert_id: int) -> Any:
    a = tables.alerts
    row = conn.execute(select(a.c.acknowledged_by).where(a.c.alert_id == alert_id)).first()
    if row is None:
        raise NotFound(f"unknown alert {alert_id}")
    return row


def acknowledge(engine: Engine, alert_id: int, *, by: str, note: str | None,
                key_name: str | None = None) -> dict[str, Any]:
    """Acknowledge an alert: a history entry, and the acknowledgement in force (a second one
    is appended and takes over; the first stays in the history); the alert afterwards."""
    with write_transaction(engine) as conn:
        _current_ack(conn, alert_id)
        now = time.time()
        _append(conn, alert_id, action="acknowledge", by=by, note=note, key_name=key_name,
                now=now, acknowledged_by=by, ack_note=note, acknowledged_s=now)
        return _get(conn, alert_id)


def unacknowledge(engine: Engine, alert_id: int, *, by: str, note: str | None,
                  key_name: str | None = None) -> dict[str, Any]:
    """Withdraw the acknowledgement in force (a history entry); ``ValidationFailed`` when the
    alert is not acknowledged."""
    with write_transaction(engine) as conn:
        if _current_ack(conn, alert_id).acknowledged_by is None:
            raise ValidationFailed(
                f"alert {alert_id} is not acknowledged, so there is no acknowledgement to "
                "withdraw; acknowledge it first (POST /v1/alerts/{id}/acknowledge)",
                code="not_acknowledged")
        now = time.time()
        _append(conn, alert_id, action="unacknowledge", by=by, note=note, key_name=key_name,
                now=now, acknowledged_by=None, ack_note=None, acknowledged_s=None)
        return _get(conn, alert_id)


def add_note(engine: Engine, alert_id: int, *, by: str, note: str,
             key_name: str | None = None) -> dict[str, Any]:
    """Append a note to an alert's history; the alert afterwards."""
    with write_transaction(engine) as conn:
        _current_ack(conn, alert_id)
        _append(conn, alert_id, action="note", by=by, note=note, key_name=key_name,
                now=time.time())
        return _get(conn, alert_id)


def detector_health(engine: Engine, detector_id: str, *,
                    clock: Callable[[Connection], float]) -> dict[str, Any]:
    """Completeness, share of intervals flagged (24 h and 7 days before ``clock(conn)``, the
    scoring clock in seconds) and open alerts of one detector."""
    d, c, e = tables.detectors, tables.counts, tables.evidence
    with read_transaction(engine) as conn:
        det = conn.execute(select(d.c.interval_s).where(d.c.detector_id == detector_id)).first()
        if det is None:
            raise NotFound(f"unknown detector {detector_id!r}")
        now = int(clock(conn))
        open_alerts = _open_alerts(conn, detector_id)
        windows = {}
        for name, span in HEALTH_WINDOWS_S:
            lo = now - span
            present = conn.execute(select(func.count()).select_from(c).where(
                c.c.detector_id == detector_id, c.c.start_s >= lo, c.c.start_s < now)).scalar_one()
            flagged = conn.execute(select(func.count(func.distinct(e.c.start_s))).where(
                e.c.detector_id == detector_id, e.c.start_s >= lo, e.c.start_s < now)).scalar_one()
            intervals = span // det.interval_s
            scored = span // scoring_interval_s(det.interval_s)  # evidence is on this grid
            windows[name] = {"from": format_utc(lo), "until": format_utc(now),
                             "intervals": intervals, "reported": present,
                             "completeness": round(present / intervals, 4),
                             "flagged_share": round(flagged / scored, 4)}
    return {"detector_id": detector_id, **windows,
            "open_alerts": open_alerts}


def _open_alerts(conn: Connection, detector_id: str) -> list[dict[str, Any]]:
    """The open alerts about a detector as ``GET /v1/alerts`` lists them: its own (but not its
    share of a group alert, which the list hides) and the open group alerts that name it."""
    a, d = tables.alerts, tables.detectors
    live = (a.c.status == "open", a.c.withdrawn == 0)
    own = conn.execute(select(a.c.alert_id, a.c.kind, a.c.start_s, a.c.suppressed).where(
        a.c.detector_id == detector_id, a.c.part_of.is_(None), *live)).all()
    group = conn.execute(select(d.c.group_id).where(d.c.detector_id == detector_id)).scalar()
    shared = []
    if group is not None:
        for r in conn.execute(select(a.c.alert_id, a.c.kind, a.c.start_s, a.c.suppressed,
                                     a.c.detectors).where(
                a.c.subject == f"group:{group}", *live)):
            if detector_id in (orjson.loads(r.detectors) if r.detectors else []):
                shared.append((r, f"group:{group}"))
    rows = [(r, None) for r in own] + shared
    rows.sort(key=lambda x: (x[0].start_s, x[0].alert_id))
    return [{"id": r.alert_id, "kind": r.kind, "start": format_utc(r.start_s),
             "suppressed": bool(r.suppressed), "subject": subject or detector_id}
            for r, subject in rows]
