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
