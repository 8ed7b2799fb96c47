"""Alert kinds of Tallyward's own: ``no_data`` becomes ``no_reports``, ``no_counts`` ``zero_counts``.

``no_reports``: nothing arrives from the detector. ``zero_counts``: it reports, but zeros where
traffic is expected. Stored alerts and their evidence rows are renamed in place (ids, ``seq``
and acknowledgements are kept); downgrade renames them back.

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-11
"""

import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision = "0004"
branch_labels = None
depends_on = None

RENAMES = (("no_data", "no_reports"), ("no_counts", "zero_counts"))


def _rename(pairs: tuple[tuple[str, str], ...]) -> None:
    conn = op.get_bind()
    for old, new in pairs:
        for table in ("alerts", "evidence"):
            conn.execute(sa.text(f"UPDATE {table} SET kind = :new WHERE kind = :old"),
                         {"old": old, "new": new})


def upgrade() -> None:
    _rename(RENAMES)


def downgrade() -> None:
    _rename(tuple((new, old) for old, new in RENAMES))
