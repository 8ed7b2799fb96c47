"""The operations view in Chromium: sign-in, the network map and table, live alerts,
acknowledgement by role, the detector's day, redirects, revocation and the request log."""

from __future__ import annotations

import time
from datetime import datetime, timedelta
from urllib.parse import urlsplit
from zoneinfo import ZoneInfo

import httpx
import pytest
from sqlalchemy import func, select

from service.store import keys as security
from service.store import tables
from service.store.engine import write_transaction
from service.store.scoring import AlertWriter
from tests.browser.conftest import (
    DEAD,
    NO_LOCATION,
    Site,
    screenshot,
    sign_in,
)
from tests.conftest import auth
from tests.web.test_alerts import alert_values

pytestmark = pytest.mark.browser
ALERT_WAIT_MS = 10_000  # the bound: an alert shows within 10 s without a reload


def test_read_key_sees_every_detector_and_one_marker_per_located_detector(
        live_server: Site, context) -> None:
    """Signed in with a read key, the network table lists every detector and the map holds one
    marker per detector that has a location (none for the one without)."""
    with live_server.engine.connect() as conn:
        d = tables.detectors
        every = {r[0] for r in conn.execute(select(d.c.detector_id))}
        located = {r[0] for r in conn.execute(select(d.c.detector_id).where(d.c.lon.is_not(None)))}
    page = context.new_page()
    sign_in(page, live_server, "read")
    rows = page.locator("#detectors tbody tr")
    assert {rows.nth(i).get_attribute("data-detector") for i in range(rows.count())} == every
    markers = page.locator("svg.map a[data-detector]")
    assert {markers.nth(i).get_attribute("data-detector")
            for i in range(markers.count())} == located
    assert markers.count() == len(located) and NO_LOCATION not in located
    # Each marker's state is also its shape and its name, never color alone.
    first = markers.first
    assert first.get_attribute("data-state") in first.get_attribute("aria-label")
    screenshot(page, "network")
    # Sorting and filtering are plain links and forms.
    page.get_by_role("link", name="Detector").click()
    page.get_by_label("Road class").select_option("local")
    page.get_by_role("button", name="Apply").click()
    shown = page.locator("#detectors tbody tr")
    assert [shown.nth(i).get_attribute("data-detector") for i in range(shown.count())] == [
        "qry-01-eb"]


def test_dead_detector_alert_appears_on_open_alerts_page_without_reload(
        live_server: Site, context) -> None:
    """Zeros at the morning peak posted through the API show up as a zero_counts row on the
    open alerts page within 10 s, by polling, with no page reload."""
    page = context.new_page()
    sign_in(page, live_server, "read")
    page.goto(live_server.url + "/ui/alerts?status=open")
    page.evaluate("window.__same_document = true")
    navigations = []
    page.on("framenavigated", lambda frame: navigations.append(frame.url))
    live_server.post_counts(live_server.dead_rows())
    row = page.locator(f'#alerts tbody tr:has(a[href="/ui/detectors/{DEAD}"])'
                       ':has(td:text-is("zero_counts"))')
    row.first.wait_for(timeout=ALERT_WAIT_MS)
    assert page.evaluate("window.__same_document") is True and navigations == []
    assert "open" in row.first.inner_text()
    screenshot(page, "alerts")


def test_operate_key_acknowledges_with_a_note_and_sees_it_in_the_history(
        live_server: Site, context) -> None:
    """An operate key acknowledges the alert with a note; the note history shows it, and the
    API reports the same acknowledgement."""
    alert = live_server.dead_alert()
    page = context.new_page()
    sign_in(page, live_server, "operate")
    page.goto(f"{live_server.url}/ui/alerts/{alert['id']}")
    page.get_by_label("Note (what was done, who was sent)").fill("Crew 4 sent to cabinet 12")
    page.get_by_role("button", name="Acknowledge").click()
    history = page.locator("#note-history")
    history.get_by_text("Crew 4 sent to cabinet 12").wait_for()
    assert "ui-operate" in history.inner_text()
    api = httpx.get(f"{live_server.url}/v1/alerts/{alert['id']}",
                    headers=auth(live_server.keys["read"])).json()
    assert api["acknowledged"] == {**api["acknowledged"], "by": "ui-operate",
                                   "note": "Crew 4 sent to cabinet 12"}
    screenshot(page, "alert-acknowledged")


def test_read_key_has_no_acknowledge_control_and_forged_posts_are_refused(
        live_server: Site, context, browser) -> None:
    """With a read key the alert page has no acknowledge form; a POST forged with the read
    session's own CSRF token is 403; an operate session's POST without its token is 403; the
    alert's acknowledgement is unchanged by either."""
    alert = live_server.dead_alert()
    before = httpx.get(f"{live_server.url}/v1/alerts/{alert['id']}",
                       headers=auth(live_server.keys["read"])).json()["acknowledged"]
    page = context.new_page()
    sign_in(page, live_server, "read")
    page.goto(f"{live_server.url}/ui/alerts/{alert['id']}")
    assert page.get_by_role("button", name="Acknowledge").count() == 0
    assert page.locator("form.ack-form").count() == 0
    token = page.locator('form[action="/ui/logout"] input[name="csrf"]').get_attribute("value")
    forged = page.request.post(f"{live_server.url}/ui/alerts/{alert['id']}/acknowledge",
                               form={"csrf": token, "note": "forged"}, max_redirects=0)
    assert forged.status == 403
    operate = browser.new_context()
    try:
        other = operate.new_page()
        sign_in(other, live_server, "operate")
        no_token = other.request.post(f"{live_server.url}/ui/alerts/{alert['id']}/acknowledge",
                                      form={"note": "no token"}, max_redirects=0)
        assert no_token.status == 403 and "CSRF" in no_token.text()
    finally:
        operate.close()
    after = httpx.get(f"{live_server.url}/v1/alerts/{alert['id']}",
                      headers=auth(live_server.keys["read"])).json()["acknowledged"]
    assert after == before


def test_detector_page_draws_band_points_and_alert_shading(live_server: Site, context) -> None:
    """The dead detector's day shows the 95 % band, one point per stored interval of the day,
    and its alert shaded with kind and cause; a point's values show on hover and on focus."""
    alert = live_server.dead_alert()
    lo, hi = live_server.test_start_s, live_server.test_start_s + 86_400
    with live_server.engine.connect() as conn:
        c = tables.counts
        stored = conn.execute(select(func.count()).select_from(c).where(
            c.c.detector_id == DEAD, c.c.start_s >= lo, c.c.start_s < hi)).scalar_one()
    page = context.new_page()
    sign_in(page, live_server, "read")
    page.goto(f"{live_server.url}/ui/detectors/{DEAD}?date={live_server.test_day}")
    assert page.locator("svg.day polygon.band").count() == 1
    assert page.locator("svg.day polyline.expected").count() == 1
    assert page.locator("svg.day g.pt").count() == stored > 0
    shade = page.locator(f'svg.day g.shade[data-alert="{alert["id"]}"]')
    assert shade.count() == 1 and "zero_counts · detector" in shade.text_content()
    # The zeros lie outside the band: drawn as squares, not only in another color.
    assert page.locator("svg.day g.pt rect.obs.out").count() >= 1
    readout = page.locator("#readout")
    page.locator("svg.day g.pt").nth(3).hover()
    assert "observed" in readout.inner_text()
    page.locator("svg.day g.pt").last.focus()
    assert "outside the band" in readout.inner_text() or "observed" in readout.inner_text()
    assert page.get_by_role("table", name="Baseline profiles (expected, local time)").count() == 1
    assert page.get_by_role("table", name="Health").count() == 1
    screenshot(page, "detector")


def test_every_ui_page_redirects_to_login_without_a_session(live_server: Site, context) -> None:
    """Without a session, every page of the view and / land on the sign-in form."""
    page = context.new_page()
    for path in ("/", "/ui/", "/ui/network", "/ui/alerts?status=open", "/ui/alerts/1",
                 f"/ui/detectors/{DEAD}"):
        page.goto(live_server.url + path)
        assert urlsplit(page.url).path == "/ui/login", path
        assert page.get_by_label("API key").count() == 1
    screenshot(page, "login")


def test_revoked_key_session_stops_working(live_server: Site, context) -> None:
    """A session made with a key that is then revoked is sent back to sign in."""
    key = security.create_key(live_server.engine, name="ui-temporary", role="read")
    page = context.new_page()
    page.goto(live_server.url + "/ui/login")
    page.get_by_label("API key").fill(key)
    page.get_by_role("button", name="Sign in").click()
    page.wait_for_url("**/ui/network")
    security.revoke_key(live_server.engine, "ui-temporary")
    page.goto(live_server.url + "/ui/alerts")
    assert urlsplit(page.url).path == "/ui/login"


def test_session_cookie_is_httponly_and_strict_and_the_key_never_shows(
        live_server: Site, context) -> None:
    """The session cookie is HttpOnly and SameSite=Strict (not Secure over plain HTTP); the key
    is in no URL the browser requested and in no page it showed; sign out ends the session."""
    urls: list[str] = []
    context.on("request", lambda request: urls.append(request.url))
    page = context.new_page()
    sign_in(page, live_server, "operate")
    key = live_server.keys["operate"]
    cookie = next(c for c in context.cookies() if c["name"] == "tw_session")
    assert cookie["httpOnly"] is True and cookie["sameSite"] == "Strict"
    assert cookie["secure"] is False and key not in cookie["value"]
    assert page.evaluate("document.cookie") == ""
    for path in ("/ui/network", "/ui/alerts", f"/ui/detectors/{DEAD}"):
        page.goto(live_server.url + path)
        assert key not in page.content()
    assert not any(key in u for u in urls)
    page.get_by_role("button", name="Sign out").click()
    page.wait_for_url("**/ui/login")
    page.goto(live_server.url + "/ui/network")
    assert urlsplit(page.url).path == "/ui/login"


def test_pages_request_nothing_but_the_service(live_server: Site, context) -> None:
    """Every request the browser makes while using the view goes to the service's own host and
    port: no CDN, font, tile or any other host."""
    live_server.dead_alert()
    hosts: set[str] = set()
    context.on("request", lambda request: hosts.add(urlsplit(request.url).netloc))
    page = context.new_page()
    sign_in(page, live_server, "operate")
    for path in ("/ui/network", "/ui/alerts?status=any", "/ui/alerts/1",
                 f"/ui/detectors/{DEAD}?date={live_server.test_day}"):
        page.goto(live_server.url + path)
        page.wait_for_load_state("networkidle")
    page.goto(live_server.url + "/ui/alerts")
    page.wait_for_timeout(3500)  # at least one poll of the live updates
    assert hosts == {urlsplit(live_server.url).netloc}


# A count station outside the dead detector's group: its alerts join no group alert of DEAD's.
SERVICE_DETECTOR = "qry-01-eb"


def _alerts_of(site: Site, detector_id: str, **params: str) -> list[dict]:
    return httpx.get(f"{site.url}/v1/alerts", params={"detector_id": detector_id, **params},
                     headers=auth(site.keys["read"]), timeout=10).json()["data"]


def test_operate_key_takes_a_detector_out_of_service_and_returns_it(
        live_server: Site, context, browser) -> None:
    """An operate key takes a count station out of service through the detector page's form
    (reason, until in local time); the page shows the state, reason, who and until when, as
    the API does. Zeros it reports meanwhile raise an alert kept as suppressed: not among the
    open alerts. Returning it to service with the page's button (from the keyboard) raises that
    alert, which the open alerts page then shows by its live updates. A read key's page has no
    such control."""
    live_server.dead_alert()  # the morning's data clock, as the other tests leave it
    zone = httpx.get(f"{live_server.url}/v1/detectors/{SERVICE_DETECTOR}",
                     headers=auth(live_server.keys["read"])).json()["timezone"]
    until = (datetime.now(ZoneInfo(zone)) + timedelta(days=2)).replace(second=0, microsecond=0)
    page = context.new_page()
    sign_in(page, live_server, "operate")
    page.goto(f"{live_server.url}/ui/detectors/{SERVICE_DETECTOR}")
    state = page.locator("#service-state")
    assert "in service" in state.inner_text()
    page.get_by_label("Reason (the fault, the work order)").fill("Loop cut by road works, WO 5521")
    page.get_by_label("Until (local time").fill(until.strftime("%Y-%m-%dT%H:%M"))
    page.get_by_role("button", name="Take out of service").click()
    page.get_by_role("button", name="Return to service").wait_for()
    shown = state.inner_text()
    assert "out of service" in shown and "WO 5521" in shown and "ui-operate" in shown
    assert until.strftime("%Y-%m-%d %H:%M") in shown
    api = httpx.get(f"{live_server.url}/v1/detectors/{SERVICE_DETECTOR}",
                    headers=auth(live_server.keys["read"])).json()["service"]
    assert api["state"] == "out_of_service" and api["by"] == "ui-operate"
    assert api["reason"] == "Loop cut by road works, WO 5521"
    screenshot(page, "detector-out-of-service")

    # An alert raised while out of service is kept as suppressed: not among the open alerts.
    # Written as the scorer writes one (the station's own zeros at this hour are too few to
    # alert on); the scorer leaves the station alone, as no counts of it arrive meanwhile.
    with write_transaction(live_server.engine) as conn:
        alert_id = AlertWriter(conn, time.time()).upsert(None, alert_values(
            SERVICE_DETECTOR, live_server.test_start_s + 5 * 3600, suppressed=1,
            group_id=None, summary="zeros while out of service"))
    kept = _alerts_of(live_server, SERVICE_DETECTOR, status="open", suppressed="true")
    assert [a["id"] for a in kept] == [alert_id]
    assert all(a["suppressed"] for a in kept)
    assert _alerts_of(live_server, SERVICE_DETECTOR, status="open") == []

    # A read key sees the state but no control.
    reader = browser.new_context()
    try:
        other = reader.new_page()
        sign_in(other, live_server, "read")
        other.goto(f"{live_server.url}/ui/detectors/{SERVICE_DETECTOR}")
        assert "out of service" in other.locator("#service-state").inner_text()
        assert other.locator("form.service-form").count() == 0
        assert other.get_by_role("button", name="Return to service").count() == 0
    finally:
        reader.close()

    # Back in service, from the keyboard: the suppressed alert is raised, and the open alerts
    # page (open beside) shows it by its live updates.
    listing = context.new_page()
    listing.goto(f"{live_server.url}/ui/alerts?status=open")
    row = listing.locator(f'#alerts tbody tr:has(a[href="/ui/detectors/{SERVICE_DETECTOR}"])')
    assert row.count() == 0
    page.goto(f"{live_server.url}/ui/detectors/{SERVICE_DETECTOR}")
    page.get_by_role("button", name="Return to service").focus()
    page.keyboard.press("Enter")
    page.get_by_role("button", name="Take out of service").wait_for()
    assert "in service" in state.inner_text()
    raised = _alerts_of(live_server, SERVICE_DETECTOR, status="open")
    assert [a["id"] for a in raised] == [alert_id] and not raised[0]["suppressed"]
    row.first.wait_for(timeout=ALERT_WAIT_MS)
    screenshot(page, "detector-back-in-service")
