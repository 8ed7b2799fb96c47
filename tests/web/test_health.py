"""GET /v1/health and the OpenAPI docs."""

from __future__ import annotations

from sqlalchemy import event, text
from starlette.testclient import TestClient

from service.config import Settings
from service.store import migrations as migrate
from service.store.engine import make_engine
from service.web.app import create_app
from tests.conftest import auth, free_port
from tests.factories import count_items, make_detector


def test_health_reports_database_migration_and_counts(client, engine, keys) -> None:
    """Health says the database answers, the schema is at head, and what is stored."""
    make_detector(engine, "D1")
    client.post("/v1/counts", json={"counts": count_items("D1", n=5)}, headers=auth(keys["ingest"]))
    if engine.dialect.name == "postgresql":  # its row estimates are current after ANALYZE
        with engine.connect().execution_options(isolation_level="AUTOCOMMIT") as conn:
            conn.execute(text("ANALYZE counts"))
            conn.execute(text("ANALYZE detectors"))
    r = client.get("/v1/health")
    body = r.json()
    assert r.status_code == 200 and body["status"] == "ok"
    assert body["migration"]["current"] == body["migration"]["head"]
    assert body["counts_stored"] == 5 and body["detectors"] == 1
    assert body["counts_stored_exact"] is False
    assert body["latest_interval"] == count_items("D1", n=5)[-1]["start"]
    assert body["scoring"]["status"] == "ok" and body["scoring"]["failing"] == []


def test_health_runs_no_count_and_no_table_scan(database_url, engine) -> None:
    """Health reads estimates and index look-ups only: no count(*) over counts, and on SQLite
    no statement plan scans a table (the one-row Alembic version table aside)."""
    client = TestClient(create_app(Settings(database_url=database_url, scoring="off"),
                                   engine=engine))  # no scorer thread sharing the engine
    statements: list[tuple[str, object]] = []

    def remember(conn, cursor, statement, parameters, context, executemany):  # type: ignore[no-untyped-def]
        statements.append((statement, parameters))

    event.listen(engine, "before_cursor_execute", remember)
    try:
        assert client.get("/v1/health").status_code == 200
    finally:
        event.remove(engine, "before_cursor_execute", remember)
    selects = [(s, p) for s, p in statements if s.lstrip().upper().startswith("SELECT")]
    assert selects
    for statement, _ in selects:
        flat = " ".join(statement.lower().split())
        assert not ("count(" in flat and "from counts" in flat), statement
    if engine.dialect.name != "sqlite":
        return
    with engine.connect() as conn:
        for statement, parameters in selects:
            plan = [r[-1] for r in conn.exec_driver_sql("EXPLAIN QUERY PLAN " + statement,
                                                        parameters)]
            scans = [p for p in plan if p.startswith("SCAN ") and p != "SCAN CONSTANT ROW"
                     and p != "SCAN alembic_version" and not p.startswith("SCAN anon_")]
            assert not scans, (statement, plan)


def test_health_is_503_while_a_migration_is_pending(database_url, engine) -> None:
    """A database behind the code's schema answers 503 migration_pending, naming both
    revisions, and health is ok again once it is upgraded."""
    client = TestClient(create_app(Settings(database_url=database_url, scoring="off"),
                                   engine=engine))
    head = migrate.head_revision(database_url)
    migrate.downgrade(database_url, "0002")
    try:
        r = client.get("/v1/health")
        assert r.status_code == 503
        assert r.json()["status"] == "migration_pending"
        assert r.json()["migration"] == {"current": "0002", "head": head}
    finally:
        migrate.upgrade(database_url)
    engine.dispose()  # connections that saw the old schema
    assert client.get("/v1/health").json()["status"] == "ok"


def test_health_on_a_database_never_migrated_is_503_migration_pending(tmp_path) -> None:
    """An empty database (no version table at all) is migration_pending, not unreachable."""
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'empty.db'}", scoring="off")
    engine = make_engine(settings)
    r = TestClient(create_app(settings, engine=engine)).get("/v1/health")
    engine.dispose()
    assert r.status_code == 503
    assert r.json()["status"] == "migration_pending" and r.json()["migration"]["current"] is None


def test_health_is_503_when_the_database_is_unreachable(database_url, tmp_path) -> None:
    """No database to talk to: 503 unavailable with the error's type, never a 500."""
    if database_url.startswith("sqlite"):
        url = f"sqlite:///{tmp_path / 'no-such-folder' / 'x.db'}"
    else:
        url = f"postgresql+psycopg://postgres@127.0.0.1:{free_port()}/nothing"
    settings = Settings(database_url=url, scoring="off")
    engine = make_engine(settings)
    r = TestClient(create_app(settings, engine=engine)).get("/v1/health")
    engine.dispose()
    assert r.status_code == 503
    assert r.json()["status"] == "unavailable" and r.json()["database"] == "unreachable"
    assert r.json()["error"]


def test_openapi_docs_are_served(client) -> None:
    """Interactive docs at /docs and the OpenAPI document list the count route."""
    assert client.get("/docs").status_code == 200
    assert "/v1/counts" in client.get("/openapi.json").json()["paths"]


def test_openapi_documents_the_health_scoring_fields(client) -> None:
    """The health response's scoring fields are described in the OpenAPI document."""
    schemas = client.get("/openapi.json").json()["components"]["schemas"]
    scoring = schemas["ScoringState"]["properties"]
    for name in ("status", "reasons", "backlog", "retrying", "oldest_unscored_age_s",
                 "longest_wait_s", "failing"):
        assert scoring[name].get("description"), name
    assert schemas["FailingDetector"]["properties"]["last_error"].get("description")


def test_unknown_route_is_json_404(client) -> None:
    """Unknown paths answer JSON, not HTML, naming the path and pointing to /docs."""
    r = client.get("/v1/nothing")
    assert r.status_code == 404 and r.json()["error"] == "not_found"
    assert r.json()["message"] == ("no such route: GET /v1/nothing; the routes are listed at "
                                   "/docs (OpenAPI document: /openapi.json)")
