"""Fixtures: a fresh database per test on SQLite always and on PostgreSQL when
TALLYWARD_TEST_DATABASE_URL is set, an app built by the factory, API keys of each role,
and a real uvicorn server on a loopback port."""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url
from starlette.testclient import TestClient

from service.config import Settings
from service.store import keys as security
from service.store import migrations as migrate
from service.store.engine import make_engine
from service.store.scratch import scratch_database
from service.web.app import create_app

PG_URL = os.environ.get("TALLYWARD_TEST_DATABASE_URL")
REPO = Path(__file__).resolve().parent.parent
BACKENDS = ["sqlite"] + (["postgresql"] if PG_URL else [])


DB_FIXTURES = {"database_url", "sqlite_url", "pg_database", "pg_admin_url", "sqlite_template",
               "settings", "engine", "app", "client", "keys"}


def _starts_servers(item: pytest.Item) -> bool:
    """A test that starts a real server or process: it uses the live_server fixture or builds a
    LiveServer / runs the CLI itself."""
    if "live_server" in getattr(item, "fixturenames", ()):
        return True
    source = getattr(getattr(item, "function", None), "__code__", None)
    names = set(source.co_names) if source is not None else set()
    return bool(names & {"LiveServer", "run", "subprocess"})


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """Tiers by what a test needs: ``unit`` (no database, no process), ``db`` (a database),
    ``http`` (a real server or CLI process); ``slow`` is set by hand on the long ones."""
    for item in items:
        if _starts_servers(item):
            item.add_marker(pytest.mark.http)
        elif DB_FIXTURES & set(getattr(item, "fixturenames", ())):
            item.add_marker(pytest.mark.db)
        else:
            item.add_marker(pytest.mark.unit)


@pytest.fixture(autouse=True)
def _clean_env(monkeypatch: pytest.MonkeyPatch) -> None:
    """No TALLYWARD_* variable of the caller's shell leaks into a test."""
    for name in list(os.environ):
        if name.startswith("TALLYWARD_"):
            monkeypatch.delenv(name)


def _normalize(url: str) -> str:
    return url.replace("postgresql://", "postgresql+psycopg://", 1) if url.startswith("postgresql://") else url


@pytest.fixture(scope="session")
def pg_database() -> Iterator[str]:
    """A throw-away PostgreSQL database for this test session, migrated to head."""
    assert PG_URL
    with scratch_database(PG_URL, "tallyward_test") as url:
        yield url


@pytest.fixture(scope="session")
def pg_admin_url() -> str:
    assert PG_URL
    return make_url(_normalize(PG_URL)).render_as_string(hide_password=False)


@pytest.fixture(scope="session")
def sqlite_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("template") / "template.db"
    migrate.upgrade(f"sqlite:///{path}")
    return path


def _truncate(url: str) -> None:
    engine = create_engine(url)
    with engine.begin() as conn:
        tables = [r[0] for r in conn.execute(text(
            "SELECT tablename FROM pg_tables WHERE schemaname = 'public' "
            "AND tablename NOT IN ('alembic_version', 'counters')"))]
        if tables:
            conn.execute(text("TRUNCATE " + ", ".join(f'"{t}"' for t in tables)
                              + " RESTART IDENTITY CASCADE"))
        conn.execute(text("UPDATE counters SET value = 0"))
    engine.dispose()


@pytest.fixture(params=BACKENDS)
def database_url(request: pytest.FixtureRequest, tmp_path: Path) -> str:
    """A migrated, empty database of each backend."""
    if request.param == "sqlite":
        path = tmp_path / "tallyward.db"
        shutil.copy(request.getfixturevalue("sqlite_template"), path)
        return f"sqlite:///{path}"
    url = request.getfixturevalue("pg_database")
    _truncate(url)
    return url


@pytest.fixture
def sqlite_url(tmp_path: Path, sqlite_template: Path) -> str:
    path = tmp_path / "tallyward.db"
    shutil.copy(sqlite_template, path)
    return f"sqlite:///{path}"


@pytest.fixture
def settings(database_url: str) -> Settings:
    return Settings(database_url=database_url)


@pytest.fixture
def engine(settings: Settings):  # type: ignore[no-untyped-def]
    eng = make_engine(settings)
    yield eng
    eng.dispose()


@pytest.fixture
def app(settings: Settings, engine):  # type: ignore[no-untyped-def]
    return create_app(settings, engine=engine)


@pytest.fixture
def client(app) -> Iterator[TestClient]:  # type: ignore[no-untyped-def]
    with TestClient(app) as c:
        yield c


@pytest.fixture
def keys(engine) -> dict[str, str]:  # type: ignore[no-untyped-def]
    """One API key per role."""
    return {role: security.create_key(engine, name=f"{role}-key", role=role)
            for role in ("ingest", "read", "operate", "admin")}


def auth(key: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {key}"}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class LiveServer:
    """``tallyward serve`` as a subprocess on a loopback port."""

    def __init__(self, database_url: str, *, env: dict[str, str] | None = None) -> None:
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.env = {**{k: v for k, v in os.environ.items() if not k.startswith("TALLYWARD_")},
                    "TALLYWARD_DATABASE_URL": database_url, "TALLYWARD_LOG_LEVEL": "WARNING",
                    **(env or {})}
        self.proc: subprocess.Popen[bytes] | None = None
        # stderr goes to a file: a pipe nobody reads fills up and stalls the server
        self.log = tempfile.TemporaryFile()

    def start(self) -> LiveServer:
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "serve", "--port", str(self.port)],
            cwd=REPO, env=self.env, stdout=subprocess.DEVNULL, stderr=self.log)
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"server exited: {self.stderr()[-2000:]}")
            try:
                if httpx.get(self.url + "/v1/health", timeout=1).status_code in (200, 503):
                    return self
            except httpx.HTTPError:
                time.sleep(0.1)
        raise RuntimeError("server did not start in 30 s")

    def stderr(self) -> str:
        """What the server has written to stderr so far."""
        self.log.seek(0)
        return self.log.read().decode(errors="replace")

    def kill(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(10)

    def stop(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.kill()


@pytest.fixture
def live_server(database_url: str) -> Iterator[LiveServer]:
    server = LiveServer(database_url).start()
    yield server
    server.stop()
