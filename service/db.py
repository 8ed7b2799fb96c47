"""Database engine for SQLite (embedded default) and PostgreSQL (production).

SQLite runs in WAL mode with ``synchronous=NORMAL`` and foreign keys on. Write
transactions on SQLite start with ``BEGIN IMMEDIATE`` so that two writers queue on the
busy timeout instead of failing on a read-to-write lock upgrade; reads stay deferred.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

from sqlalchemy import Connection, Engine, create_engine, event
from sqlalchemy.pool import NullPool

from .config import Settings

SQLITE_BUSY_TIMEOUT_MS = 30_000


def is_sqlite(engine: Engine) -> bool:
    return engine.dialect.name == "sqlite"


def make_engine(settings: Settings) -> Engine:
    url = settings.database_url
    if url.startswith("sqlite"):
        engine = create_engine(
            url,
            connect_args={"isolation_level": None, "timeout": SQLITE_BUSY_TIMEOUT_MS / 1000,
                          "check_same_thread": False},
        )

        @event.listens_for(engine, "connect")
        def _sqlite_pragmas(dbapi_conn, _record):  # type: ignore[no-untyped-def]
            cur = dbapi_conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=NORMAL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS}")
            cur.close()

        @event.listens_for(engine, "begin")
        def _sqlite_begin(conn: Connection) -> None:
            if conn.get_execution_options().get("tallyward_write"):
                conn.exec_driver_sql("BEGIN IMMEDIATE")
            else:
                conn.exec_driver_sql("BEGIN")

        return engine
    return create_engine(url, pool_pre_ping=True, pool_size=8, max_overflow=8)


def make_worker_engine(settings: Settings) -> Engine:
    """An engine for a short-lived worker process (no pooled connections kept)."""
    if settings.database_url.startswith("sqlite"):
        return make_engine(settings)
    return create_engine(settings.database_url, poolclass=NullPool)


@contextmanager
def write_transaction(engine: Engine) -> Iterator[Connection]:
    """A connection inside a write transaction, committed on success."""
    with engine.connect().execution_options(tallyward_write=True) as conn:
        with conn.begin():
            yield conn


@contextmanager
def read_transaction(engine: Engine) -> Iterator[Connection]:
    with engine.connect() as conn:
        with conn.begin():
            yield conn
