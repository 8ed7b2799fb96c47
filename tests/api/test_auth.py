"""API keys and roles: 401 without a valid key, 403 for the wrong role."""

from __future__ import annotations

from starlette.testclient import TestClient

from service import security
from service.config import Settings
from service.main import create_app
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
