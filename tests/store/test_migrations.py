"""Alembic owns the schema: empty → head → empty on both databases."""

from __future__ import annotations

import uuid

import pytest
from sqlalchemy import create_engine, inspect, text
from sqlalchemy.engine import make_url

from service.store import migrations as migrate
from tests.conftest import PG_URL


def _roundtrip(url: str) -> None:
    migrate.upgrade(url)
    engine = create_engine(url)
    tables = set(inspect(engine).get_table_names())
    assert {"detectors", "counts", "count_conflicts", "api_keys"} <= tables
    with engine.connect() as conn:
        assert conn.execute(text("SELECT version_num FROM alembic_version")).scalar() == \
            migrate.head_revision(url)
    migrate.downgrade(url, "base")
    assert set(inspect(engine).get_table_names()) <= {"alembic_version"}
    migrate.upgrade(url)
    assert "counts" in inspect(engine).get_table_names()
    engine.dispose()


def test_sqlite_upgrade_downgrade_upgrade(tmp_path) -> None:
    """SQLite: the migrations run up, down and up again."""
    _roundtrip(f"sqlite:///{tmp_path / 'm.db'}")


@pytest.mark.skipif(not PG_URL, reason="TALLYWARD_TEST_DATABASE_URL not set")
def test_postgresql_upgrade_downgrade_upgrade(pg_admin_url) -> None:
    """PostgreSQL: the migrations run up, down and up again in a fresh database."""
    name = f"tallyward_mig_{uuid.uuid4().hex[:8]}"
    admin = create_engine(pg_admin_url, isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f'CREATE DATABASE "{name}"'))
    try:
        _roundtrip(make_url(pg_admin_url).set(database=name).render_as_string(hide_password=False))
    finally:
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


def test_sqlite_runs_in_wal_mode_with_foreign_keys(sqlite_url) -> None:
    """The embedded default is durable: WAL, synchronous NORMAL, foreign keys on."""
    from service.config import Settings
    from service.store.engine import make_engine

    engine = make_engine(Settings(database_url=sqlite_url))
    with engine.connect() as conn:
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
        assert conn.exec_driver_sql("PRAGMA synchronous").scalar() == 1
        assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1
    engine.dispose()
