"""Database engine for SQLite (embedded default) and PostgreSQL (production).

SQLite runs in WAL mode with ``synchronous=NORMAL`` and foreign keys on. Write
transactions on SQLite start with ``BEGIN IMMEDIATE`` so that two writers queue on the
busy timeout instead of failing on a read-to-write lock upgrade; reads stay deferred. The
busy timeout is short (``sqlite_busy_timeout_s``): a request that cannot get the write lock
soon answers 503 with Retry-After rather than hanging. A new SQLite file is created
readable by its owner only.

PostgreSQL connections carry ``statement_timeout`` and ``lock_timeout`` from the settings,
so a held lock or a runaway statement ends in a prompt 503 instead of a stalled request.
Errors are logged without their bound parameters (``hide_parameters``): count values,
notes and key hashes stay out of the logs.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager

from sqlalchemy import Connection, Engine, create_engine, event
from sqlalchemy.engine import make_url

from service.config import Settings

PRIVATE_FILE_MODE = 0o600


def is_sqlite(engine: Engine) -> bool:
    return engine.dialect.name == "sqlite"


def create_private_sqlite_file(database_url: str) -> None:
    """Create the SQLite file of ``database_url`` with mode 0600 if it does not exist yet.

    SQLite would create it with the process umask (usually world-readable); its WAL and
    shared-memory files take the database file's mode. An existing file is left as it is."""
    if not database_url.startswith("sqlite"):
        return
    path = make_url(database_url).database
    if not path or path == ":memory:" or path.startswith("file:"):
        return
    parent = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(parent):
        return  # SQLite reports the missing folder itself
    try:
        fd = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, PRIVATE_FILE_MODE)
    except FileExistsError:
        return
    os.close(fd)


def _pg_timeouts(engine: Engine, settings: Settings) -> None:
    statement_ms = int(settings.db_statement_timeout_s * 1000)
    lock_ms = int(settings.db_lock_timeout_s * 1000)

    @event.listens_for(engine, "connect")
    def _set_timeouts(dbapi_conn, _record):
        # Session settings, set outside any transaction so that a rollback keeps them.
        autocommit = dbapi_conn.autocommit
        dbapi_conn.autocommit = True
        with dbapi_conn.cursor() as cur:
            cur.execute(f"SET statement_timeout = {statement_ms}")
            cur.execute(f"SET lock_timeout = {lock_ms}")
        dbapi_conn.autocommit = autocommit


def make_engine(settings: Settings) -> Engine:
    url = settings.database_url
    if url.startswith("sqlite"):
        create_private_sqlite_file(url)
        busy_ms = int(settings.sqlite_busy_timeout_s * 1000)
        engine = create_engine(
            url, hide_parameters=True,
            connect_args={"isolation_level": None, "timeout": busy_ms / 1000,
                          "check_same_thread": False},
        )

        @event.listens_for(engine, "connect")
        def _sqlite_pragmas(dbapi_conn, _record):
            cur = dbapi_conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=NORMAL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.execute(f"PRAGMA busy_timeout={busy_ms}")
            cur.close()

        @event.listens_for(engine, "begin")
        def _sqlite_begin(conn: Connection) -> None:
            if conn.get_execution_options().get("tallyward_write"):
                conn.exec_driver_sql("BEGIN IMMEDIATE")
            else:
                conn.exec_driver_sql("BEGIN")

        return engine
    engine = create_engine(url, pool_pre_ping=True, pool_size=8, max_overflow=8,
                           hide_parameters=True)
    _pg_timeouts(engine, settings)
    return engine


def make_worker_engine(settings: Settings) -> Engine:
    """An engine for a fit or figures worker process: one pooled connection, reused for every
    detector the process handles.

    A new PostgreSQL connection per detector cost about 40 ms each (a new server process that
    loads the catalog of every counts partition; measured with 10,500 detectors and 8 weeks of
    history: 98 ms per detector's history read and fit with a new connection each, 54 ms
    reusing one). Fit workers run long reads by design, so PostgreSQL timeouts are not set
    here; JIT compilation is off, as it cost about 9 ms more per history read than it saved."""
    if settings.database_url.startswith("sqlite"):
        return make_engine(settings)
    return create_engine(settings.database_url, pool_size=1, max_overflow=2,
                         pool_pre_ping=True, hide_parameters=True,
                         connect_args={"options": "-c jit=off"})


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
