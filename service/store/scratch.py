"""Throw-away PostgreSQL databases for tests, the contract run and benchmarks.

``scratch_database(server_url, prefix)`` creates a database with a random name on the server
of ``server_url`` (any database of that server will do for the URL; it is only used to reach
the server), migrates it to head, yields its URL, and drops it afterwards, ending any session
still connected to it. One place for this so that the tests, the contract run and the
benchmarks clean up the same way.
"""

from __future__ import annotations

import uuid
from collections.abc import Iterator
from contextlib import contextmanager

from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

from service.store import migrations


def server_url(url: str) -> str:
    """``url`` with the psycopg driver named (``postgresql://`` alone means psycopg2)."""
    if url.startswith("postgresql://"):
        return url.replace("postgresql://", "postgresql+psycopg://", 1)
    return url


@contextmanager
def scratch_database(url: str, prefix: str = "tallyward_scratch", *,
                     migrate: bool = True) -> Iterator[str]:
    """A new PostgreSQL database on the server of ``url``, migrated to head unless
    ``migrate`` is false; dropped when the block ends, however it ends."""
    server = make_url(server_url(url))
    name = f"{prefix}_{uuid.uuid4().hex[:10]}"
    admin = create_engine(server, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            conn.execute(text(f'CREATE DATABASE "{name}"'))
        try:
            made = server.set(database=name).render_as_string(hide_password=False)
            if migrate:
                migrations.upgrade(made)
            yield made
        finally:
            with admin.connect() as conn:
                conn.execute(text("SELECT pg_terminate_backend(pid) FROM pg_stat_activity "
                                  "WHERE datname = :name"), {"name": name})
                conn.execute(text(f'DROP DATABASE IF EXISTS "{name}"'))
    finally:
        admin.dispose()
