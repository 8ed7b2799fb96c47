"""Short intervals, hourly totals, and counts partitioned by time on PostgreSQL.

- The detectors CHECK constraint states the interval rule of ``service.domain.interval_ok``
  with the short intervals: 20 or 30 s, or 60..3600 s dividing one hour.
- ``count_hours``: hourly totals per detector (volume, intervals reported, intervals flagged),
  kept after the raw intervals expire.
- PostgreSQL only: ``counts`` becomes a table partitioned by range of ``start_s`` (declarative
  partitioning; the primary key (detector_id, start_s) includes the partition key), with a
  default partition that catches any interval no range partition covers yet. Existing rows
  are copied into the default partition; ``tallyward maintain`` then moves them into range
  partitions (``service.store.partitions``). SQLite keeps its plain table.

Downgrade refuses while a detector is registered at a short interval (the old rule cannot hold
it), and on PostgreSQL copies the rows back into a plain table.

Revision ID: 0008
Revises: 0007
Create Date: 2026-12-12
"""

import sqlalchemy as sa
from alembic import op

revision = "0008"
down_revision = "0007"
branch_labels = None
depends_on = None

# Written out, not imported: a migration states the schema of its revision. It equals
# service.domain.INTERVAL_CHECK_SQL (tests/store/test_interval_migration.py holds them together).
INTERVAL_CHECK_SQL = ("(interval_s >= 60 AND interval_s <= 3600 AND 3600 % interval_s = 0) "
                      "OR interval_s IN (20, 30)")
OLD_CHECK_SQL = "interval_s >= 60 AND interval_s <= 3600 AND 3600 % interval_s = 0"


def _is_pg() -> bool:
    return op.get_bind().dialect.name == "postgresql"


def upgrade() -> None:
    with op.batch_alter_table("detectors") as batch:
        batch.drop_constraint("ck_detectors_interval_allowed", type_="check")
        batch.create_check_constraint("ck_detectors_interval_allowed",
                                      sa.text(INTERVAL_CHECK_SQL))
    op.create_table(
        "count_hours",
        sa.Column("detector_id", sa.String(64), nullable=False),
        sa.Column("hour_s", sa.BigInteger, nullable=False),
        sa.Column("volume", sa.BigInteger, nullable=False),
        sa.Column("intervals", sa.Integer, nullable=False),
        sa.Column("flagged", sa.Integer, nullable=False),
        sa.ForeignKeyConstraint(["detector_id"], ["detectors.detector_id"], ondelete="CASCADE",
                                name="fk_count_hours_detector_id_detectors"),
        sa.PrimaryKeyConstraint("detector_id", "hour_s", name="pk_count_hours"),
    )
    op.create_index("ix_count_hours_hour_s", "count_hours", ["hour_s"])
    if _is_pg():
        _partition_counts()


def _partition_counts() -> None:
    conn = op.get_bind()
    for sql in (
        "ALTER TABLE counts RENAME TO counts_unpartitioned",
        "ALTER TABLE counts_unpartitioned RENAME CONSTRAINT pk_counts TO pk_counts_unpartitioned",
        "ALTER TABLE counts_unpartitioned RENAME CONSTRAINT fk_counts_detector_id_detectors "
        "TO fk_counts_unpartitioned_detector_id",
        "ALTER INDEX ix_counts_start_s RENAME TO ix_counts_unpartitioned_start_s",
        "CREATE TABLE counts (detector_id VARCHAR(64) NOT NULL, start_s BIGINT NOT NULL, "
        "count INTEGER NOT NULL, received_s DOUBLE PRECISION NOT NULL, "
        "CONSTRAINT pk_counts PRIMARY KEY (detector_id, start_s), "
        "CONSTRAINT fk_counts_detector_id_detectors FOREIGN KEY (detector_id) "
        "REFERENCES detectors (detector_id) ON DELETE CASCADE) PARTITION BY RANGE (start_s)",
        "CREATE INDEX ix_counts_start_s ON counts (start_s)",
        "CREATE TABLE counts_default PARTITION OF counts DEFAULT",
        "INSERT INTO counts SELECT detector_id, start_s, count, received_s "
        "FROM counts_unpartitioned",
        "DROP TABLE counts_unpartitioned",
    ):
        conn.execute(sa.text(sql))


def _unpartition_counts() -> None:
    conn = op.get_bind()
    for sql in (
        "CREATE TABLE counts_plain (detector_id VARCHAR(64) NOT NULL, start_s BIGINT NOT NULL, "
        "count INTEGER NOT NULL, received_s DOUBLE PRECISION NOT NULL)",
        "INSERT INTO counts_plain SELECT detector_id, start_s, count, received_s FROM counts",
        "DROP TABLE counts CASCADE",
        "ALTER TABLE counts_plain RENAME TO counts",
        "ALTER TABLE counts ADD CONSTRAINT pk_counts PRIMARY KEY (detector_id, start_s)",
        "ALTER TABLE counts ADD CONSTRAINT fk_counts_detector_id_detectors FOREIGN KEY "
        "(detector_id) REFERENCES detectors (detector_id) ON DELETE CASCADE",
        "CREATE INDEX ix_counts_start_s ON counts (start_s)",
    ):
        conn.execute(sa.text(sql))


def downgrade() -> None:
    short = op.get_bind().execute(sa.text(
        "SELECT detector_id FROM detectors WHERE interval_s < 60 ORDER BY detector_id")).all()
    if short:
        named = ", ".join(r.detector_id for r in short[:20])
        raise RuntimeError(
            f"downgrade below 0008 stopped, nothing was changed: {len(short)} detector(s) report "
            f"at 20 or 30 s, which the older rule refuses: {named}. Delete them first.")
    if _is_pg():
        _unpartition_counts()
    op.drop_index("ix_count_hours_hour_s", table_name="count_hours")
    op.drop_table("count_hours")
    with op.batch_alter_table("detectors") as batch:
        batch.drop_constraint("ck_detectors_interval_allowed", type_="check")
        batch.create_check_constraint("ck_detectors_interval_allowed", sa.text(OLD_CHECK_SQL))
