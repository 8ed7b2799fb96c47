"""Migration 0004: the detectors table's CHECK holds the domain's interval rule, existing valid
rows and their counts survive it, and a row that breaks the rule stops it with a clear message."""

from __future__ import annotations

import uuid
from collections.abc import Iterator

import pytest
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url
from sqlalchemy.exc import IntegrityError

from service.domain import ALLOWED_INTERVALS_S, INTERVAL_CHECK_SQL
from service.store import migrations as migrate
from tests.conftest import PG_URL

INSERT = text("INSERT INTO detectors (detector_id, road_class, lanes, interval_s, timezone, "
              "created_s, updated_s) VALUES (:d, 'local', 1, :s, 'UTC', 0, 0)")
REFUSED = (59, 61, 64, 96, 1440, 2880, 3601, 7200)


@pytest.fixture(params=["sqlite"] + (["postgresql"] if PG_URL else []))
def empty_url(request, tmp_path) -> Iterator[str]:  # type: ignore[no-untyped-def]
    """An empty database of each backend, not yet migrated."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'm.db'}"
        return
    admin_url = request.getfixturevalue("pg_admin_url")
    name = f"tallyward_mig_{uuid.uuid4().hex[:8]}"
    admin = create_engine(admin_url, isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f'CREATE DATABASE "{name}"'))
    yield make_url(admin_url).set(database=name).render_as_string(hide_password=False)
    with admin.connect() as conn:
        conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
    admin.dispose()


def test_migration_states_the_domain_rule() -> None:
    """The latest interval migration's (0008) CHECK text is service.domain.INTERVAL_CHECK_SQL."""
    import importlib.util

    path = migrate.migrations_dir() / "versions" / "20261212_0008_short_intervals_partitions.py"
    spec = importlib.util.spec_from_file_location("m0008", path)
    assert spec and spec.loader
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    assert module.INTERVAL_CHECK_SQL == INTERVAL_CHECK_SQL


def test_upgrade_keeps_valid_rows_and_enforces_the_rule(empty_url) -> None:
    """Rows and counts stored under 0003 survive; afterwards exactly the allowed set is stored."""
    migrate.upgrade(empty_url, "0003")
    engine = create_engine(empty_url)
    with engine.begin() as conn:
        conn.execute(INSERT, {"d": "OLD", "s": 300})
        conn.execute(text("INSERT INTO counts VALUES ('OLD', 0, 5, 0)"))
    migrate.upgrade(empty_url)
    with engine.begin() as conn:
        assert conn.execute(text("SELECT count FROM counts WHERE detector_id = 'OLD'")).scalar() == 5
        for s in ALLOWED_INTERVALS_S:
            conn.execute(INSERT, {"d": f"OK{s}", "s": s})
    for s in REFUSED:
        with pytest.raises(IntegrityError), engine.begin() as conn:
            conn.execute(INSERT, {"d": f"NO{s}", "s": s})
    with engine.begin() as conn:  # below 0008 short intervals are refused (next test)
        conn.execute(text("DELETE FROM detectors WHERE interval_s < 60"))
    migrate.downgrade(empty_url, "0003")
    with engine.begin() as conn:
        conn.execute(INSERT, {"d": "BACK", "s": 1440})  # the old range allowed it
    engine.dispose()


def test_upgrade_stops_naming_rows_that_break_the_rule(empty_url) -> None:
    """A detector stored at 1440 s under 0003 stops the upgrade: named, with the accepted set."""
    migrate.upgrade(empty_url, "0003")
    engine = create_engine(empty_url)
    with engine.begin() as conn:
        conn.execute(INSERT, {"d": "BAD", "s": 1440})
    with pytest.raises(RuntimeError, match=r"BAD \(1440 s\).*divide one hour.*60, 72, 75"):
        migrate.upgrade(empty_url)
    with engine.connect() as conn:
        assert conn.execute(text("SELECT version_num FROM alembic_version")).scalar() == "0003"
        assert conn.execute(text("SELECT interval_s FROM detectors")).scalar() == 1440
    engine.dispose()


def test_downgrade_below_0008_stops_naming_short_interval_detectors(empty_url) -> None:
    """A detector at 20 s cannot be held by the older rule: the downgrade stops, naming it,
    and the schema stays at head."""
    migrate.upgrade(empty_url)
    engine = create_engine(empty_url)
    with engine.begin() as conn:
        conn.execute(INSERT, {"d": "FAST", "s": 20})
    with pytest.raises(RuntimeError, match=r"FAST"):
        migrate.downgrade(empty_url, "0005")
    with engine.connect() as conn:
        assert conn.execute(text("SELECT interval_s FROM detectors")).scalar() == 20
    engine.dispose()
