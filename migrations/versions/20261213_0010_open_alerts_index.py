"""A partial index on the open alerts: the network page reads every detector's open alerts.

``ix_alerts_open`` on ``alerts (detector_id, kind)`` where ``status = 'open'``: open alerts are
a small share of the table, so the index stays small and the read touches only them (a partial
index, on SQLite and PostgreSQL alike).

Revision ID: 0010
Revises: 0009
Create Date: 2026-12-13
"""

import sqlalchemy as sa
from alembic import op

revision = "0010"
down_revision = "0009"
branch_labels = None
depends_on = None

OPEN = sa.text("status = 'open'")


def upgrade() -> None:
    op.create_index("ix_alerts_open", "alerts", ["detector_id", "kind"],
                    sqlite_where=OPEN, postgresql_where=OPEN)


def downgrade() -> None:
    op.drop_index("ix_alerts_open", table_name="alerts")
