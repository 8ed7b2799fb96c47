"""A real uvicorn server: round trip, chunked oversized bodies, and durability under SIGKILL."""

from __future__ import annotations

import socket
import threading
import time
from datetime import timedelta

import httpx
from sqlalchemy import func, select

from service import models
from service.timefmt import parse_rfc3339
from tests.conftest import LiveServer, auth
from tests.factories import MONDAY_LOCAL_MIDNIGHT, count_items, detector_payload, make_detector


def test_round_trip_through_real_uvicorn(live_server, keys) -> None:
    """Register a detector, post counts and read them back over real HTTP."""
    with httpx.Client(base_url=live_server.url, timeout=30) as c:
        assert c.put("/v1/detectors/D1", json=detector_payload(),
                     headers=auth(keys["admin"])).status_code == 201
        r = c.post("/v1/counts", json={"counts": count_items("D1", n=20)}, headers=auth(keys["ingest"]))
        assert r.status_code == 200 and r.json()["accepted"] == 20
        back = c.get("/v1/counts", params={"detector_id": "D1"}, headers=auth(keys["read"])).json()
        assert len(back["data"]) == 20


def test_chunked_body_over_limit_is_413(live_server, keys) -> None:
    """A chunked body (no Content-Length) is cut off with 413 once it passes the limit."""
    def chunks():  # type: ignore[no-untyped-def]
        yield b'{"counts": ['
        for _ in range(6 * 1024):
            yield b" " * 1024
        yield b"]}"

    with httpx.Client(base_url=live_server.url, timeout=30) as c:
        r = c.post("/v1/counts", content=chunks(), headers={**auth(keys["ingest"]),
                                                           "content-type": "application/json"})
    assert r.status_code == 413
    assert "limit" in r.json()["message"]


def test_batches_answered_200_survive_sigkill(database_url, engine, keys) -> None:
    """Kill -9 mid-stream: every batch that got a 200 is fully stored, none is half-stored."""
    for i in range(4):
        make_detector(engine, f"K{i}")
    server = LiveServer(database_url).start()
    acknowledged: list[int] = []
    stop = threading.Event()
    first = MONDAY_LOCAL_MIDNIGHT - timedelta(days=40)
    batches: dict[int, list[dict]] = {}
    for b in range(400):
        start = first + timedelta(seconds=300 * 25 * b)
        batches[b] = [item for i in range(4) for item in count_items(f"K{i}", n=25, start=start)]

    def feed() -> None:
        with httpx.Client(base_url=server.url, timeout=10) as c:
            for b, items in batches.items():
                if stop.is_set():
                    return
                try:
                    r = c.post("/v1/counts", json={"counts": items}, headers=auth(keys["ingest"]))
                except httpx.HTTPError:
                    return
                if r.status_code == 200:
                    acknowledged.append(b)

    t = threading.Thread(target=feed)
    t.start()
    deadline = time.monotonic() + 30
    while len(acknowledged) < 15 and time.monotonic() < deadline:
        time.sleep(0.01)
    server.kill()
    stop.set()
    t.join(30)
    assert len(acknowledged) >= 15
    server = LiveServer(database_url).start()
    try:
        with engine.connect() as conn:
            rows = conn.execute(select(models.counts.c.detector_id, models.counts.c.start_s)).all()
        present = {(r.detector_id, r.start_s) for r in rows}
        for b, items in batches.items():
            keys_b = {(i["detector_id"], parse_rfc3339(i["start"])) for i in items}
            inside = len(keys_b & present)
            assert inside in (0, len(keys_b)), f"batch {b} half-stored: {inside}/{len(keys_b)}"
            if b in acknowledged:
                assert inside == len(keys_b), f"acknowledged batch {b} lost"
        with engine.connect() as conn:
            total = conn.execute(select(func.count()).select_from(models.counts)).scalar_one()
        assert total == len(present) and total >= 15 * 100
    finally:
        server.stop()


def test_slow_client_does_not_block_server(live_server) -> None:
    """A client that opens a connection and sends nothing does not stop health checks."""
    s = socket.create_connection(("127.0.0.1", live_server.port))
    try:
        assert httpx.get(live_server.url + "/v1/health", timeout=5).status_code == 200
    finally:
        s.close()


def test_live_server_scores_as_counts_arrive(database_url, engine, keys) -> None:
    """With scoring inline, counts posted over HTTP are scored by the server's own scorer:
    the health backlog drains to zero and the dead detector's alert can be polled."""
    from service import fitting
    from service.config import Settings
    from tests.factories import load_network, small_network

    net = small_network(("bra3-nb-lt", "bra3-nb-t1", "bra3-nb-t2"), history_days=21,
                        test_days=1, seed=3)
    load_network(engine, net, until_s=net.test_start_s)
    fitting.fit_many(Settings(database_url=database_url), engine, as_of_s=net.test_start_s)
    server = LiveServer(database_url, env={"TALLYWARD_CLOCK": "data"}).start()
    try:
        ids = [d.detector_id for d in net.detectors]
        dead_from = net.test_start_s + 7 * 3600
        rows = []
        for d, t, c in zip(net.detector_index, net.start_s, net.count, strict=True):
            if t < net.test_start_s:
                continue
            count = 0 if ids[int(d)] == "bra3-nb-t1" and dead_from <= t < dead_from + 7200 else int(c)
            rows.append({"detector_id": ids[int(d)], "count": count,
                         "start": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(int(t)))})
        with httpx.Client(base_url=server.url, timeout=30) as c:
            for lo in range(0, len(rows), 300):
                r = c.post("/v1/counts", json={"counts": rows[lo : lo + 300]},
                           headers=auth(keys["ingest"]))
                assert r.status_code == 200, r.text
            deadline = time.monotonic() + 120  # a bound on waiting, not a speed requirement
            while c.get("/v1/health").json()["scoring_backlog"] and time.monotonic() < deadline:
                time.sleep(0.2)
            assert c.get("/v1/health").json()["scoring_backlog"] == 0
            alerts = c.get("/v1/alerts", params={"detector_id": "bra3-nb-t1", "kind": "no_counts"},
                           headers=auth(keys["read"])).json()["data"]
            assert len(alerts) == 1 and alerts[0]["cause"] == "detector"
            assert "counted 0 vehicles" in alerts[0]["summary"]
            health = c.get("/v1/detectors/bra3-nb-t1/health", headers=auth(keys["read"])).json()
            assert health["last_24h"]["flagged_share"] > 0
    finally:
        server.stop()
