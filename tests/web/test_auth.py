"""API keys and roles: 401 without a valid key, 403 for the wrong role."""

from __future__ import annotations

import pytest
from starlette.testclient import TestClient

from service.config import Settings
from service.errors import NotFound, ValidationFailed
from service.store import keys as security
from service.web.app import create_app
from tests.conftest import auth
from tests.factories import count_items, detector_payload


def test_missing_key_is_401(client) -> None:
    """No Authorization header: 401 saying how to send a key."""
    r = client.get("/v1/detectors")
    assert r.status_code == 401 and "Bearer" in r.json()["message"]


def test_unknown_key_is_401(client, keys) -> None:
    """A made-up key is refused."""
    assert client.get("/v1/detectors", headers=auth("tw_madeup")).status_code == 401


def test_wrong_role_is_403(client, keys) -> None:
    """An ingest key cannot read; a read key cannot post counts or register detectors."""
    assert client.get("/v1/detectors", headers=auth(keys["ingest"])).status_code == 403
    r = client.post("/v1/counts", json={"counts": count_items(n=1)}, headers=auth(keys["read"]))
    assert r.status_code == 403 and "ingest" in r.json()["message"]
    r = client.put("/v1/detectors/D1", json=detector_payload(), headers=auth(keys["operate"]))
    assert r.status_code == 403


def test_revoked_key_is_401(client, engine, keys) -> None:
    """A revoked key stops working at once."""
    assert client.get("/v1/detectors", headers=auth(keys["read"])).status_code == 200
    security.revoke_key(engine, "read-key")
    assert client.get("/v1/detectors", headers=auth(keys["read"])).status_code == 401


def test_keys_are_stored_hashed(engine, keys) -> None:
    """The database holds only SHA-256 hashes, never the key."""
    with engine.connect() as conn:
        hashes = [r[0] for r in conn.exec_driver_sql("SELECT key_hash FROM api_keys")]
    assert security.hash_key(keys["admin"]) in hashes
    assert keys["admin"] not in hashes


def test_loopback_open_demo_setting_admits_loopback_only(database_url, engine) -> None:
    """With auth=loopback-open, loopback clients need no key; other clients still do."""
    app = create_app(Settings(database_url=database_url, auth="loopback-open"), engine=engine)
    with TestClient(app, client=("127.0.0.1", 5000)) as c:
        assert c.get("/v1/detectors").status_code == 200
    with TestClient(app, client=("203.0.113.9", 5000)) as c:
        assert c.get("/v1/detectors").status_code == 401


def test_401_names_the_bearer_scheme_in_www_authenticate(client, keys) -> None:
    """A 401, for a read or a write, carries WWW-Authenticate: Bearer (RFC 6750)."""
    for r in (client.get("/v1/detectors"),
              client.post("/v1/counts", json={"counts": count_items(n=1)}),
              client.get("/v1/detectors", headers=auth("tw_madeup"))):
        assert r.status_code == 401
        assert r.headers["www-authenticate"].startswith("Bearer")


def test_post_with_a_key_lacking_any_write_role_is_403_before_the_body(client, keys) -> None:
    """A read key posting counts is refused with 403 and the connection is closed."""
    r = client.post("/v1/counts", content=b"not even json", headers=auth(keys["read"]))
    assert r.status_code == 403 and "ingest" in r.json()["message"]
    assert r.headers["connection"] == "close"


def test_post_body_is_refused_for_a_role_the_route_does_not_grant(client, keys) -> None:
    """An ingest key acknowledging an alert, or an operate key registering a detector, is 403
    before the (here malformed) body is looked at."""
    r = client.post("/v1/alerts/1/acknowledge", content=b"{", headers=auth(keys["ingest"]))
    assert r.status_code == 403 and "operate" in r.json()["message"]
    r = client.put("/v1/detectors/D1", content=b"{", headers=auth(keys["operate"]))
    assert r.status_code == 403 and "admin" in r.json()["message"]


def test_key_checked_before_the_body_still_reaches_the_route(client, keys) -> None:
    """With a valid key of the right role the body is read and the route answers."""
    r = client.put("/v1/detectors/D1", json=detector_payload(), headers=auth(keys["admin"]))
    assert r.status_code == 201
    r = client.post("/v1/counts", json={"counts": count_items(n=3)}, headers=auth(keys["ingest"]))
    assert r.status_code == 200 and r.json()["accepted"] == 3


def test_loopback_open_demo_setting_admits_loopback_writes(database_url, engine) -> None:
    """With auth=loopback-open, a loopback client may register a detector without a key."""
    app = create_app(Settings(database_url=database_url, auth="loopback-open"), engine=engine)
    with TestClient(app, client=("127.0.0.1", 5000)) as c:
        assert c.put("/v1/detectors/D1", json=detector_payload()).status_code == 201
    with TestClient(app, client=("203.0.113.9", 5000)) as c:
        assert c.put("/v1/detectors/D2", json=detector_payload()).status_code == 401


def test_loopback_open_does_not_admit_requests_relayed_by_a_proxy(database_url, engine) -> None:
    """A loopback request that carries a proxy forwarding header needs a key even in demo mode."""
    app = create_app(Settings(database_url=database_url, auth="loopback-open"), engine=engine)
    with TestClient(app, client=("127.0.0.1", 5000)) as c:
        for header in ("X-Forwarded-For", "Forwarded", "X-Real-IP"):
            assert c.get("/v1/detectors", headers={header: "203.0.113.9"}).status_code == 401
            r = c.put("/v1/detectors/D1", json=detector_payload(), headers={header: "203.0.113.9"})
            assert r.status_code == 401


def test_key_names_with_control_characters_are_refused(engine) -> None:
    """`keys create` refuses a name holding NUL or a line break with a clear message."""
    for name in ("wall\x00board", "wall\nboard"):
        with pytest.raises(ValidationFailed, match="control character"):
            security.create_key(engine, name=name, role="read")
    with pytest.raises(NotFound):
        security.revoke_key(engine, "wall\x00board")
