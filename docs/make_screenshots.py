"""Screenshots of the web view for the README, from a database the demo (or anything) built.

    .venv/bin/python docs/make_screenshots.py [--database sqlite:///demo_run/tallyward.db]
        [--detector kfw-sb-054-l1 --date 2026-11-17] [--out docs]

Serves the database with the data clock on a loopback port, makes a throw-away read key,
signs in through the form in Debian's Chromium (Playwright) and saves ui-network.png,
ui-alerts.png and ui-detector.png; the key is revoked afterwards.
"""

from __future__ import annotations

import argparse
import sys
import uuid
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from playwright.sync_api import sync_playwright  # noqa: E402

from service.config import Settings  # noqa: E402
from service.store import keys as security  # noqa: E402
from service.store.engine import make_engine  # noqa: E402
from service.tools.networks import serving  # noqa: E402

ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--no-first-run"]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--database", default=f"sqlite:///{REPO}/demo_run/tallyward.db")
    parser.add_argument("--detector", default="kfw-sb-054-l1")
    parser.add_argument("--date", default="2026-11-17")
    parser.add_argument("--out", default=str(REPO / "docs"))
    parser.add_argument("--scheme", default="light", choices=("light", "dark"))
    args = parser.parse_args()
    engine = make_engine(Settings(database_url=args.database))
    name = f"screenshots-{uuid.uuid4().hex[:8]}"
    key = security.create_key(engine, name=name, role="read")
    out = Path(args.out)
    try:
        with serving(args.database, env={"TALLYWARD_CLOCK": "data"},
                     start_timeout_s=300) as (base, _proc), \
                sync_playwright() as p:
            browser = p.chromium.launch(executable_path="/usr/bin/chromium", args=ARGS)
            page = browser.new_page(viewport={"width": 1440, "height": 900},
                                    color_scheme=args.scheme)
            page.goto(base + "/ui/login")
            page.get_by_label("API key").fill(key)
            page.get_by_role("button", name="Sign in").click()
            page.wait_for_url("**/ui/network")
            page.screenshot(path=str(out / "ui-network.png"))
            page.goto(base + "/ui/alerts?status=any")
            page.screenshot(path=str(out / "ui-alerts.png"))
            page.goto(f"{base}/ui/detectors/{args.detector}?date={args.date}")
            page.screenshot(path=str(out / "ui-detector.png"), full_page=True)
            browser.close()
    finally:
        security.revoke_key(engine, name)
        engine.dispose()
    print(f"saved {out}/ui-network.png, ui-alerts.png, ui-detector.png")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
