"""Accessibility of the main pages, checked by axe-core (vendored, MPL-2.0: see
tests/browser/vendor/README.md) in Chromium, in the light and the dark theme: no serious or
critical violation of the WCAG 2.0/2.1 A and AA rules axe implements (labels, contrast,
landmarks, names of links and images, ARIA use). Keyboard use is checked by tabbing."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest

from tests.browser.conftest import DEAD, Site, screenshot, sign_in

pytestmark = pytest.mark.browser
AXE = (Path(__file__).parent / "vendor" / "axe.min.js").read_text(encoding="utf-8")
TAGS = ["wcag2a", "wcag2aa", "wcag21a", "wcag21aa"]


def axe_violations(page: Any) -> list[dict[str, Any]]:
    """axe-core's serious and critical violations on the page as loaded."""
    page.add_script_tag(content=AXE)
    result = page.evaluate("tags => axe.run(document, {runOnly: {type: 'tag', values: tags}})",
                           TAGS)
    return [{"id": v["id"], "impact": v["impact"], "help": v["help"],
             "nodes": [n["target"] for n in v["nodes"][:5]]}
            for v in result["violations"] if v["impact"] in ("serious", "critical")]


@pytest.mark.parametrize("scheme", ["light", "dark"])
def test_main_pages_have_no_serious_accessibility_violation(live_server: Site, browser,
                                                            scheme: str) -> None:
    """Sign-in, network, alerts, one alert, one detector's day and its planners' figures pass
    axe's A/AA rules."""
    alert = live_server.dead_alert()
    # The pages forbid inline script (CSP); the test context lets axe's injected copy run.
    context = browser.new_context(bypass_csp=True, color_scheme=scheme,
                                  viewport={"width": 1400, "height": 1000})
    try:
        page = context.new_page()
        page.goto(live_server.url + "/ui/login")
        found = {"login": axe_violations(page)}
        sign_in(page, live_server, "operate")
        for name, path in (("network", "/ui/network"), ("alerts", "/ui/alerts?status=any"),
                           ("alert", f"/ui/alerts/{alert['id']}"),
                           ("detector", f"/ui/detectors/{DEAD}?date={live_server.test_day}"),
                           ("figures",
                            f"/ui/detectors/{DEAD}/figures?year={live_server.test_day[:4]}")):
            page.goto(live_server.url + path)
            found[name] = axe_violations(page)
            if scheme == "dark":
                screenshot(page, f"{name}-dark")
        assert {k: v for k, v in found.items() if v} == {}
    finally:
        context.close()


def test_pages_are_keyboard_navigable(live_server: Site, context) -> None:
    """From the top of a page, Tab reaches the skip link first, then the navigation; the
    network table's links and the alert filters are reachable and visibly focused."""
    page = context.new_page()
    sign_in(page, live_server, "read")
    page.goto(live_server.url + "/ui/network")
    page.keyboard.press("Tab")
    assert page.evaluate("document.activeElement.textContent") == "Skip to content"
    page.keyboard.press("Tab")
    assert page.evaluate("document.activeElement.textContent") == "Network"
    page.keyboard.press("Tab")
    assert page.evaluate("document.activeElement.textContent") == "Alerts"
    page.keyboard.press("Enter")
    page.wait_for_url("**/ui/alerts**")
    focused_outline = None
    for _ in range(30):
        page.keyboard.press("Tab")
        if page.evaluate("document.activeElement.name") == "kind":
            focused_outline = page.evaluate(
                "getComputedStyle(document.activeElement).outlineStyle")
            break
    assert focused_outline not in (None, "none")
