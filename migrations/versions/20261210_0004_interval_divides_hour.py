"""Interval rule: a detector's interval_s is 60..3600 seconds and divides one hour.

The detectors table allowed any interval from 60 to 3600 s and the API any divisor of a day in
that range, but a baseline can only be fitted (and thresholds derived) for an interval that
divides an hour: a detector registered at 1,440 s was stored and then failed every fit. The
CHECK constraint now states the rule of ``service.domain.interval_ok``.

Existing rows are checked first: a detector whose interval breaks the rule could never be fitted,
and the upgrade stops with a message naming it (nothing is changed) rather than failing on the
constraint halfway. Downgrade restores the plain 60..3600 range, which every row satisfies.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-10
"""

import sqlalchemy as sa
from alembic import op

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None

# Written out, not imported: a migration states the schema of its revision. It equals
# service.domain.INTERVAL_CHECK_SQL (tests/store/test_interval_migration.py holds them together).
INTERVAL_CHECK_SQL = "interval_s >= 60 AND interval_s <= 3600 AND 3600 % interval_s = 0"
ALLOWED = ", ".join(str(s) for s in range(60, 3601) if 3600 % s == 0)
OLD_CHECK_SQL = "interval_s >= 60 AND interval_s <= 3600"
SHOWN = 20  # offending detectors named in the message


def _refuse_rows_that_break_the_rule() -> None:
    rows = op.get_bind().execute(sa.text(
        f"SELECT detector_id, interval_s FROM detectors WHERE NOT ({INTERVAL_CHECK_SQL}) "
        "ORDER BY detector_id")).all()
    if not rows:
        return
    named = ", ".join(f"{r.detector_id} ({r.interval_s} s)" for r in rows[:SHOWN])
    more = f" and {len(rows) - SHOWN} more" if len(rows) > SHOWN else ""
    raise RuntimeError(
        f"migration 0004 stopped, nothing was changed: {len(rows)} detector(s) have an interval "
        f"that no baseline can be fitted for: {named}{more}. interval_s must be 60..3600 "
        f"seconds and divide one hour (3600 s): {ALLOWED}. Re-register each at an allowed "
        "interval (its stored counts must be deleted first: they are on the old grid) or "
        "delete it, then run the migration again.")


def upgrade() -> None:
    _refuse_rows_that_break_the_rule()
    with op.batch_alter_table("detectors") as batch:
        batch.drop_constraint("ck_detectors_interval_range", type_="check")
        batch.create_check_constraint("ck_detectors_interval_allowed",
                                      sa.text(INTERVAL_CHECK_SQL))


def downgrade() -> None:
    with op.batch_alter_table("detectors") as batch:
        batch.drop_constraint("ck_detectors_interval_allowed", type_="check")
        batch.create_check_constraint("ck_detectors_interval_range", sa.text(OLD_CHECK_SQL))
