"""The browser tier: a real ``tallyward serve`` on a loopback port with a small fitted network,
and Debian's Chromium driven by Playwright.

One server per test session and backend (SQLite always, PostgreSQL when TALLYWARD_TEST_DATABASE_URL
is set): building and fitting the network is the slow part. Screenshots are written to
``test-artifacts/browser/`` (ignored by git).
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import httpx
import pytest

from service.config import Settings
from service.pipeline import fit as fitting
from service.store import keys as security
from service.store.engine import make_engine
from service.store.scratch import scratch_database
from tests.conftest import BACKENDS, PG_URL, REPO, LiveServer, auth
from tests.factories import load_network, make_detector, small_network

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--no-first-run"]
ARTIFACTS = REPO / "test-artifacts" / "browser"
# Three lanes of one approach (5-minute) and a rural count station (15-minute): fitting is the
# slow part of the set-up, so the network is small.
DETECTORS = ("bra3-nb-lt", "bra3-nb-t1", "bra3-nb-t2", "qry-01-eb")
DEAD = "bra3-nb-t1"  # the detector the tests make go dead at the morning peak
PEAK_FROM_H = 7  # local hour the normal test-day counts run up to; the dead intervals start here
DEAD_INTERVALS = 6  # 30 minutes of zeros at 5-minute intervals
NO_LOCATION = "lab-bench-1"  # registered without coordinates: listed, not on the map
WAIT_S = 60  # a bound on waiting for the server, not a speed requirement
START_WAIT_S = 300  # seconds

pytestmark = pytest.mark.browser


@dataclass
class Site:
    """A served network: URL, database, keys by role, and the simulated test day."""

    url: str
    database_url: str
    engine: Any
    keys: dict[str, str]
    test_start_s: int
    interval_rows: list[dict[str, Any]] = field(default_factory=list)

    @property
    def test_day(self) -> str:
        return datetime.fromtimestamp(self.test_start_s, ZoneInfo("America/Chicago")
                                      ).date().isoformat()

    def post_counts(self, rows: list[dict[str, Any]]) -> None:
        with httpx.Client(base_url=self.url, timeout=30) as c:
            for lo in range(0, len(rows), 500):
                r = c.post("/v1/counts", json={"counts": rows[lo:lo + 500]},
                           headers=auth(self.keys["ingest"]))
                assert r.status_code == 200, r.text

    def dead_rows(self) -> list[dict[str, Any]]:
        start = self.test_start_s + PEAK_FROM_H * 3600
        return [{"detector_id": DEAD, "count": 0, "start": _rfc(start + i * 300)}
                for i in range(DEAD_INTERVALS)]

    def dead_alert(self) -> dict[str, Any]:
        """Post the dead-detector intervals (idempotent) and wait for their alert."""
        self.post_counts(self.dead_rows())
        deadline = time.monotonic() + WAIT_S
        while True:
            found = httpx.get(self.url + "/v1/alerts", params={
                "detector_id": DEAD, "kind": "zero_counts", "status": "open"},
                headers=auth(self.keys["read"]), timeout=10).json()["data"]
            if found:
                return found[-1]
            assert time.monotonic() < deadline, "no zero_counts alert for the dead detector"
            time.sleep(0.2)


def _rfc(epoch_s: int) -> str:
    return datetime.fromtimestamp(epoch_s, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


@pytest.fixture(scope="session", params=BACKENDS)
def site(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
         ) -> Iterator[Site]:
    stack = ExitStack()
    if request.param == "sqlite":
        path = tmp_path_factory.mktemp("ui") / "tallyward.db"
        shutil.copy(request.getfixturevalue("sqlite_template"), path)
        url = f"sqlite:///{path}"
    else:
        # A database of its own: the shared test database is emptied by other tests while
        # this server lives for the whole session.
        url = stack.enter_context(own_pg_database())
    engine = make_engine(Settings(database_url=url))
    net = small_network(DETECTORS, history_days=21, test_days=1, seed=3)
    load_network(engine, net, until_s=net.test_start_s)
    make_detector(engine, NO_LOCATION, location=None, group=None, label="Bench test loop")
    fitting.fit_many(Settings(database_url=url), engine, as_of_s=net.test_start_s)
    keys = {role: security.create_key(engine, name=f"ui-{role}", role=role)
            for role in ("ingest", "read", "operate", "admin")}
    server = start_patiently(LiveServer(url, env={"TALLYWARD_CLOCK": "data"}))
    ids = [d.detector_id for d in net.detectors]
    until = net.test_start_s + PEAK_FROM_H * 3600
    rows = [{"detector_id": ids[int(d)], "count": int(c), "start": _rfc(int(t))}
            for d, t, c in zip(net.detector_index, net.start_s, net.count, strict=True)
            if net.test_start_s <= t < until]
    found = Site(server.url, url, engine, keys, net.test_start_s, rows)
    try:
        found.post_counts(rows)
        yield found
    finally:
        server.stop()
        engine.dispose()
        stack.close()


def start_patiently(server: LiveServer) -> LiveServer:
    """Start the server, waiting up to START_WAIT_S: on a shared, loaded machine importing
    numpy, scipy and FastAPI alone has taken a minute (a bound on waiting, not a speed rule)."""
    server.proc = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "serve", "--port", str(server.port)],
        cwd=REPO, env=server.env, stdout=subprocess.DEVNULL, stderr=server.log)
    deadline = time.monotonic() + START_WAIT_S
    while time.monotonic() < deadline:
        if server.proc.poll() is not None:
            raise RuntimeError(f"server exited: {server.stderr()[-2000:]}")
        try:
            if httpx.get(server.url + "/v1/health", timeout=5).status_code in (200, 503):
                return server
        except httpx.HTTPError:
            time.sleep(0.2)
    server.stop()
    raise RuntimeError(f"server did not start in {START_WAIT_S} s")


@contextmanager
def own_pg_database() -> Iterator[str]:
    """A new PostgreSQL database migrated to head, dropped afterwards."""
    assert PG_URL
    with scratch_database(PG_URL, "tallyward_ui") as url:
        yield url


@pytest.fixture(scope="session")
def browser() -> Iterator[Any]:
    if not CHROMIUM.exists():
        pytest.fail("Debian's Chromium is missing: apt-get install -y chromium (.ci/run does it)")
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        chromium = p.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        yield chromium
        chromium.close()


@pytest.fixture
def context(browser: Any) -> Iterator[Any]:
    ctx = browser.new_context(viewport={"width": 1400, "height": 1000})
    yield ctx
    ctx.close()


def sign_in(page: Any, site: Site, role: str) -> None:
    """Sign in through the form, as a person would."""
    page.goto(site.url + "/ui/login")
    page.get_by_label("API key").fill(site.keys[role])
    page.get_by_role("button", name="Sign in").click()
    page.wait_for_url("**/ui/network")


def screenshot(page: Any, name: str) -> Path:
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    path = ARTIFACTS / f"{name}.png"
    page.screenshot(path=str(path), full_page=True)
    return path


@pytest.fixture
def live_server(site: Site) -> Site:
    """The module's server (named so the tier hook marks these tests ``http``)."""
    return site
