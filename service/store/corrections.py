"""Count corrections: an admin replaces a stored count, and the old value, the new value, the
reason, who and when are kept (``count_corrections``, appended, never changed).

A correction changes a count that was already scored, so the detector is marked for rescoring
from that interval in the same transaction (``service.store.scoring.mark_dirty``, the ingest
hook): alerts follow the corrected data as they would have had it arrived so.
"""

from __future__ import annotations

import time
from types import SimpleNamespace
from typing import Any

from sqlalchemy import Engine, select, update

from service.errors import NotFound, ValidationFailed
from service.store import tables
from service.store.engine import read_transaction, write_transaction
from service.store.scoring import mark_dirty
from service.timefmt import format_utc


def correction_public(r: Any) -> dict[str, Any]:
    return {"id": r.correction_id, "detector_id": r.detector_id, "start": format_utc(r.start_s),
            "old": r.old_count, "new": r.new_count, "reason": r.reason, "by": r.actor,
            "at": format_utc(r.corrected_s), "conflict_id": r.conflict_id}


def correct_count(engine: Engine, *, detector_id: str | None, start_s: int | None,
                  count: int | None, reason: str, by: str, conflict_id: int | None = None,
                  now: float | None = None) -> dict[str, Any]:
    """Replace one stored count and record the correction; the correction.

    With ``conflict_id`` the detector and interval are the conflict's and the new count
    defaults to its offered value. ``NotFound`` for an unknown detector, conflict or a count
    that is not stored; ``ValidationFailed`` for a negative count or one equal to the stored
    value."""
    now = time.time() if now is None else now
    c, k, d = tables.counts, tables.count_conflicts, tables.detectors
    if count is not None and count < 0:
        raise ValidationFailed(f"count {count} is negative; counts are whole numbers of "
                               "vehicles, 0 or more")
    with write_transaction(engine) as conn:
        if conflict_id is not None:
            conflict = conn.execute(select(k).where(k.c.conflict_id == conflict_id)).first()
            if conflict is None:
                raise NotFound(f"unknown conflict {conflict_id}; see GET /v1/counts/conflicts")
            if (detector_id is not None and detector_id != conflict.detector_id) or \
                    (start_s is not None and start_s != conflict.start_s):
                raise ValidationFailed(
                    f"conflict {conflict_id} is about {conflict.detector_id} at "
                    f"{format_utc(conflict.start_s)}; leave detector_id and start out, or give "
                    "those")
            detector_id, start_s = conflict.detector_id, conflict.start_s
            if count is None:
                count = conflict.offered_count
        if detector_id is None or start_s is None or count is None:
            raise ValidationFailed("give detector_id, start and count, or conflict_id (to "
                                   "accept its offered value)")
        if conn.execute(select(d.c.detector_id).where(d.c.detector_id == detector_id)
                        ).first() is None:
            raise NotFound(f"unknown detector {detector_id!r}")
        stored = conn.execute(select(c.c.count).where(
            c.c.detector_id == detector_id, c.c.start_s == start_s).with_for_update()).first()
        if stored is None:
            raise NotFound(f"no count is stored for {detector_id} at {format_utc(start_s)}; "
                           "only stored counts can be corrected (store a missing one with "
                           "POST /v1/counts)")
        if stored.count == count:
            raise ValidationFailed(f"the stored count for {detector_id} at "
                                   f"{format_utc(start_s)} is already {count}; nothing to "
                                   "correct")
        conn.execute(update(c).where(c.c.detector_id == detector_id, c.c.start_s == start_s)
                     .values(count=count))
        correction_id = conn.execute(tables.count_corrections.insert().values(
            detector_id=detector_id, start_s=start_s, old_count=stored.count, new_count=count,
            reason=reason, actor=by, corrected_s=now, conflict_id=conflict_id)
            .returning(tables.count_corrections.c.correction_id)).scalar_one()
        mark_dirty(conn, SimpleNamespace(stored_from={detector_id: start_s}))
        row = conn.execute(select(tables.count_corrections).where(
            tables.count_corrections.c.correction_id == correction_id)).one()
    return correction_public(row)


def corrections_page(engine: Engine, *, detector_id: str | None, after: int, limit: int
                     ) -> dict[str, Any]:
    """Corrections after a correction id, oldest first; ``NotFound`` for an unknown detector."""
    k, d = tables.count_corrections, tables.detectors
    q = select(k).where(k.c.correction_id > after).order_by(k.c.correction_id).limit(limit)
    with read_transaction(engine) as conn:
        if detector_id is not None:
            if conn.execute(select(d.c.detector_id).where(d.c.detector_id == detector_id)
                            ).first() is None:
                raise NotFound(f"unknown detector {detector_id!r}")
            q = q.where(k.c.detector_id == detector_id)
        rows = conn.execute(q).all()
    data = [correction_public(r) for r in rows]
    return {"data": data, "next_after": data[-1]["id"] if data else after}
