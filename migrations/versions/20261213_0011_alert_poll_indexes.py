"""Alert polls with a filter read only the matching alerts, in seq order.

A poll is ``seq > after AND <filters> ORDER BY seq LIMIT n``. Caught up (``after`` near the
top) it reads a few entries of the seq index whatever the filters. Far behind (a dashboard's
first poll, ``after=0``) with a filter few alerts match, the seq index alone meant walking
every alert from ``after`` on: PostgreSQL's generic plan for the prepared statement (which
psycopg prepares after a few executions) does exactly that, measured at 54 ms for
``group=``+``kind=`` and 92 ms for a kind no alert has, over 100,000 alerts
(``bench/poll_cost.py``), growing with the table.

Indexes (filter column, seq) for the filters a poll takes besides the detector (which has its
own index, and few alerts): ``group_id`` (replacing the single-column ``ix_alerts_group_id``,
whose lookups the new index serves as well), ``kind`` and ``status``. The planner then reads
the matching alerts from ``after`` on, in order, and stops at ``n``.

Revision ID: 0011
Revises: 0010
Create Date: 2026-12-13
"""

from alembic import op

revision = "0011"
down_revision = "0010"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_index("ix_alerts_group_id_seq", "alerts", ["group_id", "seq"])
    op.drop_index("ix_alerts_group_id", table_name="alerts")
    op.create_index("ix_alerts_kind_seq", "alerts", ["kind", "seq"])
    op.create_index("ix_alerts_status_seq", "alerts", ["status", "seq"])


def downgrade() -> None:
    op.drop_index("ix_alerts_status_seq", table_name="alerts")
    op.drop_index("ix_alerts_kind_seq", table_name="alerts")
    op.create_index("ix_alerts_group_id", "alerts", ["group_id"])
    op.drop_index("ix_alerts_group_id_seq", table_name="alerts")
