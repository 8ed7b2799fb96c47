"""Schema upgrades through Alembic, callable from the CLI, the server start and tests."""

from __future__ import annotations

import functools
import importlib.util
import os
from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Engine

PACKAGE = "service.migrations"  # migrations/ as installed (pyproject.toml: package-dir)


@functools.cache
def migrations_dir() -> Path:
    """The Alembic folder, looked up on first use: where ``TALLYWARD_MIGRATIONS_DIR`` says,
    else beside the package in a checkout, else inside the installed package
    (``service/migrations``), else ``./migrations`` (a container's working folder)."""
    for candidate in (os.environ.get("TALLYWARD_MIGRATIONS_DIR"),
                      Path(__file__).resolve().parents[2] / "migrations",
                      _installed_dir(),
                      Path.cwd() / "migrations"):
        if candidate and (Path(candidate) / "env.py").is_file():
            return Path(candidate)
    raise FileNotFoundError("the migrations folder was not found (neither in the installed "
                            "package nor beside it); set TALLYWARD_MIGRATIONS_DIR to the folder "
                            "holding env.py")


def _installed_dir() -> Path | None:
    try:
        spec = importlib.util.find_spec(PACKAGE)
    except ImportError:
        return None
    if spec is None or not spec.submodule_search_locations:
        return None
    return Path(next(iter(spec.submodule_search_locations)))


def alembic_config(database_url: str) -> Config:
    cfg = Config()
    cfg.set_main_option("script_location", str(migrations_dir()))
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
