"""Schema upgrades through Alembic, callable from the CLI, the server start and tests."""

from __future__ import annotations

import os
from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Engine


def _migrations_dir() -> Path:
    """The Alembic folder: beside the package in a checkout, or in the working folder
    (a container copies it there), or where TALLYWARD_MIGRATIONS_DIR says."""
    for candidate in (os.environ.get("TALLYWARD_MIGRATIONS_DIR"),
                      Path(__file__).resolve().parents[2] / "migrations",
                      Path.cwd() / "migrations"):
        if candidate and (Path(candidate) / "env.py").exists():
            return Path(candidate)
    raise FileNotFoundError("the migrations folder was not found; set TALLYWARD_MIGRATIONS_DIR")


MIGRATIONS = _migrations_dir()


def alembic_config(database_url: str) -> Config:
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS))
    cfg.set_main_option("sqlalchemy.url", database_url.replace("%", "%%"))
    return cfg


def upgrade(database_url: str, revision: str = "head") -> None:
    from service.store.engine import create_private_sqlite_file

    create_private_sqlite_file(database_url)  # before Alembic's engine creates it world-readable
    command.upgrade(alembic_config(database_url), revision)


def downgrade(database_url: str, revision: str = "base") -> None:
    command.downgrade(alembic_config(database_url), revision)


def head_revision(database_url: str) -> str | None:
    return ScriptDirectory.from_config(alembic_config(database_url)).get_current_head()


def current_revision(engine: Engine) -> str | None:
    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()
