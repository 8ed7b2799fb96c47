"""The web view's HTTP rules without a browser: sign-in cookie attributes, idle expiry, CSRF,
roles, redirects, hashed static assets and bad query values (the browser tests in
tests/browser/ drive the same pages in Chromium)."""

from __future__ import annotations

import re
import time

import pytest
from starlette.testclient import TestClient

from service.config import Settings
from service.store import keys as security
from service.web.app import create_app
from service.web.ui.assets import ASSETS, URL_OF
from service.web.ui.session import COOKIE, cookie_value
from tests.factories import make_detector

UI_PAGES = ("/ui/", "/ui/network", "/ui/alerts", "/ui/alerts/1", "/ui/detectors/D1")


def sign_in(client: TestClient, key: str) -> TestClient:
    r = client.post("/ui/login", data={"key": key, "next": "/ui/network"},
                    follow_redirects=False)
    assert r.status_code == 303, r.text
    return client


def csrf_of(html: str) -> str:
    return re.search(r'name="csrf" value="([^"]+)"', html).group(1)  # type: ignore[union-attr]


def test_ui_pages_redirect_to_login_without_a_session(client) -> None:
    """Every page of the view, and /, sends a visitor without a session to the sign-in form."""
    assert client.get("/", follow_redirects=False).headers["location"] == "/ui/"
    for path in UI_PAGES:
        r = client.get(path, follow_redirects=True)
        assert r.url.path == "/ui/login", path
        assert 'name="key"' in r.text


def test_sign_in_sets_a_strict_httponly_cookie_and_never_echoes_the_key(client, keys) -> None:
    """A good key gets a session cookie (HttpOnly, SameSite=Strict, no Secure over plain HTTP)
    and a redirect; the key appears neither in the redirect nor in the page."""
    r = client.post("/ui/login", data={"key": keys["read"], "next": "/ui/network"},
                    follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == "/ui/network"
    cookie = r.headers["set-cookie"]
    assert cookie.startswith(f"{COOKIE}=") and "HttpOnly" in cookie
    assert "SameSite=strict" in cookie or "SameSite=Strict" in cookie
    assert "Secure" not in cookie and keys["read"] not in cookie
    page = client.get("/ui/network")
    assert page.status_code == 200 and keys["read"] not in page.text
    assert "Content-Security-Policy" in page.headers


def test_sign_in_over_https_marks_the_cookie_secure(app, keys) -> None:
    """Served over HTTPS, the session cookie carries Secure."""
    with TestClient(app, base_url="https://testserver") as c:
        r = c.post("/ui/login", data={"key": keys["read"]}, follow_redirects=False)
    assert r.status_code == 303 and "Secure" in r.headers["set-cookie"]


def test_sign_in_refuses_unknown_and_ingest_only_keys(client, keys) -> None:
    """An unknown key is 401 and an ingest-only key 403, each with the form and a reason."""
    r = client.post("/ui/login", data={"key": "tw_nope"})
    assert r.status_code == 401 and "unknown or revoked" in r.text
    r = client.post("/ui/login", data={"key": keys["ingest"]})
    assert r.status_code == 403 and "may not read" in r.text


def test_sign_in_goes_back_only_to_a_page_of_the_view(client, keys) -> None:
    """The ``next`` target is honored inside /ui/ and replaced by the network page otherwise."""
    r = client.post("/ui/login", data={"key": keys["read"], "next": "//evil.example/x"},
                    follow_redirects=False)
    assert r.headers["location"] == "/ui/network"


def test_idle_session_expires(database_url, keys) -> None:
    """A session whose last request is older than the idle setting sends back to sign in."""
    app = create_app(Settings(database_url=database_url, ui_session_idle_s=60))
    with TestClient(app) as c:
        sign_in(c, keys["read"])
        assert c.get("/ui/network", follow_redirects=False).status_code == 200
        key_id = int(c.cookies[COOKIE].split(".")[0])
        stale = cookie_value(app.state.ui_secret, key_id, "n0nce", int(time.time()) - 61)
        c.cookies.clear()
        c.cookies.set(COOKIE, stale, path="/ui")
        r = c.get("/ui/network", follow_redirects=False)
        assert r.status_code == 303 and r.headers["location"].startswith("/ui/login")


def test_forged_or_tampered_cookie_is_refused(client, keys) -> None:
    """A cookie whose signature does not match is no session."""
    sign_in(client, keys["admin"])
    value = client.cookies[COOKIE]
    body, sig = value.rsplit(".", 1)
    key_id, nonce, seen = body.split(".")
    client.cookies.clear()
    client.cookies.set(COOKIE, f"{int(key_id) + 1}.{nonce}.{seen}.{sig}", path="/ui")
    assert client.get("/ui/network", follow_redirects=False).status_code == 303


def test_revoked_key_ends_its_session(client, engine) -> None:
    """Revoking the key ends a session made with it at the next request."""
    key = security.create_key(engine, name="short-lived", role="read")
    sign_in(client, key)
    assert client.get("/ui/network", follow_redirects=False).status_code == 200
    security.revoke_key(engine, "short-lived")
    assert client.get("/ui/network", follow_redirects=False).status_code == 303


def test_acknowledge_needs_csrf_and_operate(client, engine, keys) -> None:
    """A POST without the session's CSRF token is 403; a read key's POST with its token is 403
    too; an operate key's POST with its token acknowledges."""
    from tests.web.test_alerts import BASE_T, write_alert

    make_detector(engine, "D1")
    alert_id = write_alert(engine, "D1", BASE_T)
    sign_in(client, keys["read"])
    token = csrf_of(client.get(f"/ui/alerts/{alert_id}").text)
    assert 'action="/ui/alerts/' not in client.get(f"/ui/alerts/{alert_id}").text
    r = client.post(f"/ui/alerts/{alert_id}/acknowledge", data={"csrf": token, "note": "x"})
    assert r.status_code == 403 and "may not acknowledge" in r.text
    client.cookies.clear()
    sign_in(client, keys["operate"])
    r = client.post(f"/ui/alerts/{alert_id}/acknowledge", data={"note": "x"})
    assert r.status_code == 403 and "CSRF" in r.text
    token = csrf_of(client.get(f"/ui/alerts/{alert_id}").text)
    r = client.post(f"/ui/alerts/{alert_id}/acknowledge",
                    data={"csrf": token, "note": "crew sent"}, follow_redirects=True)
    assert r.status_code == 200 and "crew sent" in r.text
    assert client.get(f"/v1/alerts/{alert_id}", headers={
        "Authorization": f"Bearer {keys['read']}"}).json()["acknowledged"]["note"] == "crew sent"


def test_acknowledge_refuses_a_control_character_note(client, engine, keys) -> None:
    """A note holding NUL is a 400 page that says why; nothing is stored."""
    from tests.web.test_alerts import BASE_T, write_alert

    make_detector(engine, "D1")
    alert_id = write_alert(engine, "D1", BASE_T)
    sign_in(client, keys["operate"])
    token = csrf_of(client.get(f"/ui/alerts/{alert_id}").text)
    r = client.post(f"/ui/alerts/{alert_id}/acknowledge", data={"csrf": token, "note": "a\x00b"})
    assert r.status_code == 400 and "control character" in r.text


@pytest.mark.parametrize("path", ["/ui/network?state=broken", "/ui/network?sort=nope",
                                  "/ui/alerts?kind=dead", "/ui/alerts?status=maybe",
                                  "/ui/detectors/D1?date=2026-13-01"])
def test_bad_filter_values_are_a_400_page_naming_what_is_accepted(client, engine, keys,
                                                                   path) -> None:
    """Unknown filter, sort or date values get a 400 page, never a 500 or an empty list."""
    make_detector(engine, "D1")
    sign_in(client, keys["read"])
    r = client.get(path)
    assert r.status_code == 400 and ("one of" in r.text or "YYYY-MM-DD" in r.text)


def test_static_assets_carry_a_content_hash_and_are_cached(client) -> None:
    """The stylesheet and script are served under hashed names with a year-long immutable
    cache; an unknown name is 404."""
    for url in URL_OF.values():
        r = client.get(url)
        assert r.status_code == 200 and "immutable" in r.headers["cache-control"]
        name = url.rsplit("/", 1)[1]
        assert re.fullmatch(r"ui\.[0-9a-f]{12}\.(css|js)", name) and name in ASSETS
    assert client.get("/ui/static/ui.css").status_code == 404


def test_ui_routes_are_not_in_the_api_document(client) -> None:
    """The view is not part of the JSON API contract."""
    paths = client.get("/openapi.json").json()["paths"]
    assert not any(p.startswith("/ui") for p in paths) and "/" not in paths


def _service(client: TestClient, key: str, detector_id: str = "D1") -> dict:
    return client.get(f"/v1/detectors/{detector_id}",
                      headers={"Authorization": f"Bearer {key}"}).json()["service"]


def test_service_state_form_needs_csrf_and_operate(client, engine, keys) -> None:
    """A read key sees the detector's service state but no form, and its POST (with its own
    token) is 403; an operate key's POST without the token is 403; with the token it takes the
    detector out of service and returns it, as the API records."""
    make_detector(engine, "D1")
    sign_in(client, keys["read"])
    page = client.get("/ui/detectors/D1").text
    assert "Service state" in page and "in service" in page
    assert 'action="/ui/detectors/D1/service"' not in page
    r = client.post("/ui/detectors/D1/service", data={
        "csrf": csrf_of(page), "state": "out_of_service", "reason": "forged"})
    assert r.status_code == 403 and "may not change" in r.text
    assert _service(client, keys["read"])["state"] == "in_service"
    client.cookies.clear()
    sign_in(client, keys["operate"])
    r = client.post("/ui/detectors/D1/service",
                    data={"state": "out_of_service", "reason": "no token"})
    assert r.status_code == 403 and "CSRF" in r.text
    assert _service(client, keys["read"])["state"] == "in_service"
    page = client.get("/ui/detectors/D1").text
    assert 'action="/ui/detectors/D1/service"' in page
    r = client.post("/ui/detectors/D1/service", data={
        "csrf": csrf_of(page), "state": "out_of_service", "reason": "loop cut by road works",
        "until": "2099-06-01T08:30"}, follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"].startswith("/ui/detectors/D1")
    api = _service(client, keys["read"])
    assert api["state"] == "out_of_service" and api["by"] == "operate-key"
    assert api["reason"] == "loop cut by road works" and api["until"] is not None
    page = client.get("/ui/detectors/D1").text
    assert "out of service" in page and "loop cut by road works" in page
    assert "2099-06-01 08:30" in page and "Return to service" in page
    r = client.post("/ui/detectors/D1/service",
                    data={"csrf": csrf_of(page), "state": "in_service"}, follow_redirects=True)
    assert r.status_code == 200 and "Take out of service" in r.text
    assert _service(client, keys["read"])["state"] == "in_service"


@pytest.mark.parametrize(("fields", "said"), [
    ({"reason": "   "}, "reason is required"),
    ({"reason": "cabinet open", "until": "2001-01-01T00:00"}, "not in the future"),
    ({"reason": "cabinet open", "until": "next tuesday"}, "YYYY-MM-DDTHH:MM"),
    ({"reason": "cabinet open", "until": "2099-03-08T02:30"}, "does not exist"),
    ({"reason": "a\x00b"}, "control character"),
    ({"reason": "x" * 501}, "at most 500"),
    ({"reason": "cabinet open", "state": "retired"}, "in_service or out_of_service"),
])
def test_service_state_form_refuses_bad_input_with_the_page_and_a_message(
        client, engine, keys, fields, said) -> None:
    """An empty reason, an until in the past, unparseable or skipped by the clocks, a control
    character or an over-long reason, or a state this page does not set: a 400 page (the
    detector's own, form filled in again) saying what was wrong; nothing changes."""
    make_detector(engine, "D1", timezone="America/Chicago")
    sign_in(client, keys["operate"])
    token = csrf_of(client.get("/ui/detectors/D1").text)
    r = client.post("/ui/detectors/D1/service",
                    data={"csrf": token, "state": "out_of_service", **fields})
    assert r.status_code == 400 and said in r.text, r.text[-1500:]
    assert 'id="service-error"' in r.text and "Detector D1" in r.text
    assert _service(client, keys["read"])["state"] == "in_service"


HOSTILE = '<img src=x onerror="alert(1)">&\'"'


def test_text_people_typed_is_shown_as_text_on_every_page(client, engine, keys) -> None:
    """A detector label, an out-of-service reason, an acknowledgement note and a key name that
    hold markup are shown escaped on every page that shows them: the markup never reaches the
    page as markup."""
    from tests.web.test_alerts import BASE_T, write_alert

    make_detector(engine, "D1", label=HOSTILE)
    alert_id = write_alert(engine, "D1", BASE_T)
    hostile_key = security.create_key(engine, name=HOSTILE, role="admin")
    sign_in(client, hostile_key)
    page = client.get("/ui/detectors/D1").text
    client.post("/ui/detectors/D1/service", data={
        "csrf": csrf_of(page), "state": "out_of_service", "reason": HOSTILE})
    token = csrf_of(client.get(f"/ui/alerts/{alert_id}").text)
    client.post(f"/ui/alerts/{alert_id}/acknowledge", data={"csrf": token, "note": HOSTILE})
    escaped = "&lt;img src=x onerror=&quot;alert(1)&quot;&gt;&amp;&#x27;&quot;"
    for path in ("/ui/network", "/ui/alerts?status=open", f"/ui/alerts/{alert_id}",
                 "/ui/detectors/D1", "/ui/detectors/D1/figures"):
        r = client.get(path)
        assert r.status_code == 200, (path, r.text[:300])
        assert "<img" not in r.text and "onerror=\"" not in r.text, path
        assert escaped in r.text, path
