"""The main job in one command, on the embedded SQLite default and the demo network.

Creates ``demo_run/run-<time>/tallyward.db`` (a new folder per run, so a database a server
still uses is never replaced; ``demo_run/latest`` names the newest), loads ``seed_feed/``'s detectors and history, fits every
baseline as of the start of the test period, starts the service on a loopback port with the
data clock, replays the test period through the HTTP API as field controllers would, waits
for scoring, prints the alerts an operator would see and scores them against the truth.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import httpx
import orjson

from service.config import Settings
from service.errors import TallywardError
from service.pipeline import fit as fitting
from service.store import keys as security
from service.store import migrations as migrate
from service.store.detectors import import_feature_collection
from service.store.engine import make_engine
from service.textio import table
from service.timefmt import parse_rfc3339
from service.tools import evaluate, networks
from service.tools.replay import replay, wait_for_scoring

REPO = Path(__file__).resolve().parents[2]  # the checkout: service/tools/demo.py -> ../../..


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _step(text: str) -> float:
    print(f"\n== {text}", file=sys.stderr, flush=True)
    return time.perf_counter()


def load_history(engine: Any, counts_path: Path, *, until_s: int) -> dict:
    """Store a feed's counts before ``until_s``, with a progress bar."""
    from tqdm import tqdm

    with tqdm(unit="count", desc="load history", file=sys.stderr) as bar:
        total = networks.store_history(engine, networks.feed_history(counts_path, until_s=until_s),
                                       progress=bar.update)
    return {"accepted": total.accepted, "duplicate": total.duplicate,
            "rejected": len(total.rejected)}


def run_demo(*, feed: Path, folder: Path, workers: int = 2, speed: str = "max") -> int:
    from tqdm import tqdm

    started = time.perf_counter()
    truth = evaluate.load_truth(feed / "truth.json")
    test_start = parse_rfc3339(truth["test"]["start"])
    folder.mkdir(parents=True, exist_ok=True)
    db_path = folder / "tallyward.db"
    if db_path.exists():  # never replace a database a server may be using
        raise TallywardError(f"{db_path} exists; the demo makes a new database in a new folder")
    url = f"sqlite:///{db_path}"
    settings = Settings(database_url=url, clock="data")
    t = _step(f"database {db_path} (SQLite, WAL) — migrating to head")
    migrate.upgrade(url)
    engine = make_engine(settings)
    result = import_feature_collection(engine, orjson.loads((feed / "detectors.geojson").read_bytes()))
    print(f"detectors: {result['created']} created, {len(result['errors'])} rejected", file=sys.stderr)

    t = _step("bulk-loading the 6-week history")
    loaded = load_history(engine, feed / "counts.csv.gz", until_s=test_start)
    print(f"history: {loaded['accepted']:,} counts stored in {time.perf_counter() - t:.1f} s",
          file=sys.stderr)

    t = _step(f"fitting baselines as of {truth['test']['start']} ({workers} processes)")
    with tqdm(total=result["created"], unit="det", desc="fit", file=sys.stderr) as bar:
        fits = fitting.fit_many(settings, engine, as_of_s=test_start, workers=workers,
                                progress=bar.update)
    by_status: dict[str, int] = {}
    for f in fits:
        by_status[f["status"]] = by_status.get(f["status"], 0) + 1
    print(f"fits: {by_status} in {time.perf_counter() - t:.1f} s", file=sys.stderr)

    ingest_key = security.create_key(engine, name="demo-controllers", role="ingest")
    read_key = security.create_key(engine, name="demo-dashboard", role="read")
    view_key = security.create_key(engine, name="demo-operator", role="operate")  # the web view
    engine.dispose()
    port = _free_port()
    base = f"http://127.0.0.1:{port}"
    env = {**{k: v for k, v in os.environ.items() if not k.startswith("TALLYWARD_")},
           "TALLYWARD_DATABASE_URL": url, "TALLYWARD_CLOCK": "data",
           "TALLYWARD_LOG_LEVEL": "WARNING"}
    t = _step(f"starting the service on {base} (data clock) and replaying the 2-week test period")
    server = subprocess.Popen([sys.executable, "-m", "service.cli", "serve", "--port", str(port)],
                              cwd=REPO, env=env, stdout=subprocess.DEVNULL,
                              stderr=open(folder / "server.log", "wb"))  # noqa: SIM115
    try:
        for _ in range(300):
            try:
                if httpx.get(base + "/v1/health", timeout=1).status_code == 200:
                    break
            except httpx.HTTPError:
                time.sleep(0.1)
        with tqdm(unit="count", desc="replay", file=sys.stderr) as bar:
            summary = replay(feed, url=base, key=ingest_key, speed=speed, from_s=test_start,
                             batch=2000, progress=bar.update)
        table([[f"{summary.rows:,}", summary.batches, f"{summary.accepted:,}",
                f"{summary.duplicate:,}", summary.rejected, f"{summary.seconds:.1f}",
                f"{summary.rows / max(summary.seconds, 1e-9):,.0f}"]],
              ["rows", "batches", "accepted", "duplicate", "rejected", "seconds", "counts/s"])
        t = _step("waiting for the scorer to finish")
        backlog = wait_for_scoring(base, timeout_s=900)
        print(f"scoring backlog {backlog} after {time.perf_counter() - t:.1f} s", file=sys.stderr)
        alerts = evaluate.fetch_alerts(base, read_key)
        intervals = evaluate.detector_intervals(base, read_key)
        print_alerts(alerts, intervals)
        report = evaluate.evaluate(truth, alerts, intervals=intervals)
        print("\nDetection against the demo's injected truth (test period):")
        evaluate.print_report(report)
        (folder / "evaluation.json").write_bytes(orjson.dumps(report, option=orjson.OPT_INDENT_2))
        picture = demo_plot(base, read_key, truth, alerts, folder)
        if picture:
            print(f"\nplot of one detector's day against its baseline: {picture}")
        demo_figures(base, read_key, year=int(truth["test"]["start"][:4]))
    finally:
        server.terminate()
        try:
            server.wait(15)
        except subprocess.TimeoutExpired:
            server.kill()
    print(f"\ndemo finished in {time.perf_counter() - started:.0f} s; database left at {db_path}")
    print(f"Serve it (README: From the demo to a running service):\n"
          f"  export TALLYWARD_DATABASE_URL=sqlite:///{db_path.resolve()}\n"
          f"  export TALLYWARD_CLOCK=data\n"
          f"  .venv/bin/tallyward serve")
    print("Alerts are advisory: verify in the field before acting (see README, Cautions).")
    print(f"\nweb view: TALLYWARD_DATABASE_URL={url} TALLYWARD_CLOCK=data .venv/bin/tallyward "
          f"serve --port 8000\n  then open http://127.0.0.1:8000/ui/ and sign in with the demo's "
          f"operate key (key name demo-operator):\n  {view_key}")
    return 0


def print_alerts(alerts: list[dict[str, Any]], intervals: dict[str, int]) -> None:
    from datetime import datetime
    from zoneinfo import ZoneInfo

    zone = ZoneInfo("America/Chicago")
    rows = []
    for a in sorted(alerts, key=lambda a: a["start"]):
        lo = datetime.fromisoformat(a["start"].replace("Z", "+00:00")).astimezone(zone)
        hi = datetime.fromisoformat(a["end"].replace("Z", "+00:00")).astimezone(zone)
        rows.append([a["id"], a["detector_id"] or f"[{a['group']}]", a["kind"], a["cause"],
                     a["status"], lo.strftime("%a %d %b %H:%M"),
                     f"{(hi - lo).total_seconds() / 3600:.1f}", a["score"],
                     (a["summary"][:70] + "…") if len(a["summary"]) > 71 else a["summary"]])
    print(f"\nAlerts an operator would see ({len(alerts)}):")
    table(rows, ["id", "detector", "kind", "cause", "status", "start (local)", "hours", "score",
                 "summary"])


def demo_plot(base: str, key: str, truth: dict[str, Any], alerts: list[dict[str, Any]],
              folder: Path) -> Path | None:
    from service.tools.plots import plot_day

    target = next((i for i in truth["injections"] if i.get("period") == "test"
                   and i["kind"] == "zero_counts"), None)
    if target is None:
        return None
    det = target["detector_ids"][0]
    day = target["start"][:10]
    headers = {"Authorization": f"Bearer {key}"}
    with httpx.Client(base_url=base, headers=headers, timeout=30) as c:
        doc = c.get(f"/v1/detectors/{det}/baseline", params={"date": day}).json()
        lo, hi = doc["data"][0]["start"], doc["data"][-1]["start"]
        counts = c.get("/v1/counts", params={"detector_id": det, "from": lo, "until": hi}).json()
        info = c.get(f"/v1/detectors/{det}").json()
    mine = [a for a in alerts if a["detector_id"] == det]
    name = info.get("label") or det
    return plot_day(doc, counts["data"], mine, title=f"{name} ({det}), {day} (demo {target['id']})",
                    out=folder / f"{det}_{day}.png", timezone=info.get("timezone"))


def main_demo(feed: str | None = None, folder: str | None = None, workers: int = 2) -> int:
    if feed:
        feed_path = Path(feed)
    else:  # the working folder's seed_feed/ first (an installed package has no checkout)
        feed_path = next((p for p in (Path.cwd() / "seed_feed", REPO / "seed_feed")
                          if (p / "truth.json").exists()), REPO / "seed_feed")
    if folder:
        out = Path(folder)
        if (out / "tallyward.db").exists():
            raise TallywardError(
                f"{out} already holds a demo database ({out / 'tallyward.db'}); a server may be "
                "using it, so the demo does not replace it. Pick a new --folder, or leave "
                "--folder out for a fresh demo_run/run-<time>/ folder, or delete the old one "
                "yourself once nothing uses it")
        if out.exists() and any(out.iterdir()):
            raise TallywardError(f"{out} exists and is not empty; pick another with --folder")
    else:
        out = new_run_folder(Path.cwd() / "demo_run")
    return run_demo(feed=feed_path, folder=out, workers=workers)


def new_run_folder(parent: Path) -> Path:
    """A new ``run-<UTC time>`` folder under ``parent``, recorded in ``parent/latest``.

    Each run gets its own database, so a run never replaces the database of an earlier run
    that a server may still be serving. ``latest`` is a text file holding the newest run's
    folder: read once (``$(cat demo_run/latest)``), it stays valid when a later run starts."""
    parent.mkdir(parents=True, exist_ok=True)
    stamp = time.strftime("%Y%m%d-%H%M%S", time.gmtime())
    for n in range(100):
        out = parent / (f"run-{stamp}" if n == 0 else f"run-{stamp}-{n}")
        try:
            out.mkdir()
        except FileExistsError:
            continue
        (parent / "latest").write_text(f"{out}\n", encoding="utf-8")
        return out
    raise TallywardError(f"could not make a new run folder under {parent}")


def demo_figures(base: str, key: str, *, year: int) -> None:
    """A planner's figures for one station (a group: the sum of its lanes) with the share of
    the year that was imputed; six weeks of counts leave most of a year to the baseline."""
    with httpx.Client(base_url=base, headers={"Authorization": f"Bearer {key}"},
                      timeout=120) as c:
        dets = c.get("/v1/detectors", params={"limit": 1000}).json()["data"]
        group = next((d["group"] for d in dets if d["group"]), None)
        if group is None:
            return
        r = c.get(f"/v1/groups/{group}/figures", params={"year": year})
    if r.status_code != 200:
        print(f"\nplanners' figures for {group}: {r.json().get('message')}")
        return
    f = r.json()
    print(f"\nPlanners' figures, station {group} ({len(f['detectors'])} detectors), {year}: "
          f"{f['days']['with_data']} of {f['days']['in_period']} days counted, "
          f"{f['imputed_share']:.0%} of intervals imputed "
          f"(AASHTO sufficiency met: {f['sufficiency']['meets_rule']})")
    rows = [[name, f[name]["value"], f"{f[name]['low']}..{f[name]['high']}"]
            for name in ("aadt", "adt", "hv30", "k30")]
    for part in ("am", "pm"):
        p = (f["peak_hours"] or {}).get("weekday", {}).get(part)
        if p:
            rows.append([f"weekday {part} peak {p['start']} PHF", p["phf"],
                         f"{p['phf_low']}..{p['phf_high']} ({p['days']} days)"])
    table(rows, ["figure", "value", f"{f['level']:.0%} interval"])
