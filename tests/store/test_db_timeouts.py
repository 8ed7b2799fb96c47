"""A stuck database answers promptly: a held lock or a long statement turns into 503 with
Retry-After (PostgreSQL lock_timeout / statement_timeout, SQLite busy timeout), errors are
logged without their parameters, and a new SQLite file is private to its owner."""

from __future__ import annotations

import logging
import os
import sqlite3
import stat
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url
from sqlalchemy.exc import OperationalError
from starlette.testclient import TestClient

from service.config import Settings
from service.store import migrations as migrate
from service.store.engine import make_engine
from service.web.app import create_app
from tests.conftest import auth
from tests.factories import count_items, make_detector

SHORT = {"db_lock_timeout_s": 0.3, "sqlite_busy_timeout_s": 0.3}


@contextmanager
def counts_table_locked(database_url: str) -> Iterator[None]:
    """Another session holds the counts table: ACCESS EXCLUSIVE on PostgreSQL, the database's
    write lock on SQLite."""
    if database_url.startswith("sqlite"):
        conn = sqlite3.connect(make_url(database_url).database, isolation_level=None)
        conn.execute("BEGIN IMMEDIATE")
        try:
            yield
        finally:
            conn.execute("ROLLBACK")
            conn.close()
        return
    holder = create_engine(database_url)
    with holder.connect() as conn:
        conn.execute(text("LOCK TABLE counts IN ACCESS EXCLUSIVE MODE"))
        try:
            yield
        finally:
            conn.rollback()
    holder.dispose()


@pytest.fixture
def short_wait_app(database_url: str):  # type: ignore[no-untyped-def]
    settings = Settings(database_url=database_url, scoring="off", **SHORT)
    engine = make_engine(settings)
    yield create_app(settings, engine=engine), engine
    engine.dispose()


def test_post_counts_while_the_counts_table_is_locked_is_503(database_url, short_wait_app,
                                                              keys) -> None:
    """A POST that cannot get the counts table's lock gives up after the lock wait with 503
    and Retry-After, storing nothing; once the lock is gone the same batch is stored."""
    app, engine = short_wait_app
    make_detector(engine, "D1")
    items = count_items("D1", n=5)
    with TestClient(app) as c:
        with counts_table_locked(database_url):
            r = c.post("/v1/counts", json={"counts": items}, headers=auth(keys["ingest"]))
        assert r.status_code == 503, r.text
        assert int(r.headers["retry-after"]) > 0
        r = c.post("/v1/counts", json={"counts": items}, headers=auth(keys["ingest"]))
        assert r.status_code == 200 and r.json()["accepted"] == 5


def test_acknowledge_while_the_database_is_locked_is_503(database_url, short_wait_app,
                                                          keys) -> None:
    """Other writes than ingest also turn a held lock into 503 with Retry-After."""
    app, engine = short_wait_app
    make_detector(engine, "D1")
    with TestClient(app) as c:
        if database_url.startswith("sqlite"):
            locked = counts_table_locked(database_url)
        else:
            locked = _alerts_locked(database_url)
        with locked:
            r = c.post("/v1/alerts/1/acknowledge", json={"by": "desk"},
                       headers=auth(keys["operate"]))
        assert r.status_code == 503 and "retry-after" in r.headers


@contextmanager
def _alerts_locked(database_url: str) -> Iterator[None]:
    holder = create_engine(database_url)
    with holder.connect() as conn:
        conn.execute(text("LOCK TABLE alerts IN ACCESS EXCLUSIVE MODE"))
        try:
            yield
        finally:
            conn.rollback()
    holder.dispose()


def test_get_counts_while_the_table_is_locked_is_503_on_postgresql(database_url, short_wait_app,
                                                                   keys) -> None:
    """A read blocked by an ACCESS EXCLUSIVE lock ends in 503 with Retry-After."""
    if not database_url.startswith("postgresql"):
        pytest.skip("SQLite readers are not blocked by a writer (WAL)")
    app, engine = short_wait_app
    make_detector(engine, "D1")
    with TestClient(app) as c, counts_table_locked(database_url):
        r = c.get("/v1/counts", params={"detector_id": "D1"}, headers=auth(keys["read"]))
    assert r.status_code == 503 and "retry-after" in r.headers


def test_postgresql_connections_carry_statement_and_lock_timeouts(database_url) -> None:
    """The engine's connections have the configured timeouts; a long statement is canceled
    with an OperationalError (which the service answers with 503)."""
    if not database_url.startswith("postgresql"):
        pytest.skip("statement_timeout and lock_timeout are PostgreSQL settings")
    engine = make_engine(Settings(database_url=database_url, db_statement_timeout_s=0.2,
                                  db_lock_timeout_s=0.1))
    try:
        with engine.connect() as conn:
            assert conn.execute(text("SHOW statement_timeout")).scalar() == "200ms"
            assert conn.execute(text("SHOW lock_timeout")).scalar() == "100ms"
            with pytest.raises(OperationalError) as caught:
                conn.execute(text("SELECT pg_sleep(5)"))
            assert type(caught.value.orig).__name__ == "QueryCanceled"
            conn.rollback()
            # The timeouts survive a rollback: they are session settings.
            assert conn.execute(text("SHOW statement_timeout")).scalar() == "200ms"
    finally:
        engine.dispose()


def test_default_timeouts_are_bounded() -> None:
    """Out of the box a request waits at most 5 s for a lock and 30 s for a statement."""
    settings = Settings()
    assert settings.db_lock_timeout_s == 5 and settings.db_statement_timeout_s == 30
    assert settings.sqlite_busy_timeout_s == 5


def test_database_errors_are_logged_without_their_parameters(database_url, client, engine, keys,
                                                             caplog) -> None:
    """An unhandled database error is logged with its statement but not the bound values."""
    secret = "tw_secret_value_that_must_not_be_logged"

    # Statements whose error messages do not quote the value: only the logged parameters could.
    if database_url.startswith("sqlite"):  # a count for a detector that does not exist
        statement = "INSERT INTO counts (detector_id, start_s, count, received_s) VALUES (:v, 0, 0, 0)"
    else:
        statement = "SELECT no_such_column FROM counts WHERE detector_id = :v"

    @client.app.get("/boom")
    def boom() -> None:
        with engine.begin() as conn:
            conn.execute(text(statement), {"v": secret})

    with caplog.at_level(logging.ERROR, logger="tallyward.http"):
        r = client.get("/boom")
    assert r.status_code == 500
    logged = "\n".join(record.getMessage() + logging.Formatter().formatException(record.exc_info)
                       for record in caplog.records if record.exc_info)
    assert statement.split()[0] in logged and secret not in logged


def test_new_sqlite_database_file_is_private(tmp_path: Path) -> None:
    """Migrating a new SQLite database creates its file (and WAL files) readable by the
    owner only, whatever the umask."""
    path = tmp_path / "fresh.db"
    old = os.umask(0o022)
    try:
        migrate.upgrade(f"sqlite:///{path}")
        engine = make_engine(Settings(database_url=f"sqlite:///{path}"))
        make_detector(engine, "D1")
        for name in (path, Path(f"{path}-wal"), Path(f"{path}-shm")):
            if name.exists():
                assert stat.S_IMODE(name.stat().st_mode) == 0o600, name
        engine.dispose()
    finally:
        os.umask(old)
