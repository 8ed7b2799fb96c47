"""A real uvicorn server: round trip, chunked oversized bodies, durability under SIGKILL, and
connection limits: the key checked before the body, header/body/idle deadlines, header size,
the connection cap and request ids."""

from __future__ import annotations

import re
import shutil
import socket
import threading
import time
from collections.abc import Iterator
from datetime import timedelta

import httpx
import pytest
from sqlalchemy import func, select

from service.config import Settings
from service.store import keys as security
from service.store import tables as models
from service.store.engine import make_engine
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
    from service.config import Settings
    from service.pipeline import fit as fitting
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
            alerts = c.get("/v1/alerts", params={"detector_id": "bra3-nb-t1", "kind": "zero_counts"},
                           headers=auth(keys["read"])).json()["data"]
            assert len(alerts) == 1 and alerts[0]["cause"] == "detector"
            assert "counted 0 vehicles" in alerts[0]["summary"]
            health = c.get("/v1/detectors/bra3-nb-t1/health", headers=auth(keys["read"])).json()
            assert health["last_24h"]["flagged_share"] > 0
    finally:
        server.stop()


# ----------------------------------------------------------------- connections and bodies

SOCKET_WAIT_S = 20  # an upper bound on waiting for the server, far above every deadline used


def exchange(port: int, data: bytes) -> bytes:
    """Send raw bytes on a new connection and read until the server closes it."""
    with socket.create_connection(("127.0.0.1", port), timeout=SOCKET_WAIT_S) as s:
        if data:
            s.sendall(data)
        received = b""
        while True:
            try:
                chunk = s.recv(65536)
            except TimeoutError:
                raise AssertionError(f"the server kept the connection open; got {received!r}"
                                     ) from None
            if not chunk:
                return received
            received += chunk


def status_of(response: bytes) -> int:
    return int(response.split(b" ", 2)[1])


@pytest.fixture(scope="module")
def tight_server(tmp_path_factory, sqlite_template) -> Iterator[tuple[LiveServer, dict[str, str]]]:
    """A live server (SQLite) with one-second header, body and keep-alive deadlines, a cap of
    six connections, 4 KiB of headers, and keys of each role."""
    path = tmp_path_factory.mktemp("tight") / "tallyward.db"
    shutil.copy(sqlite_template, path)
    url = f"sqlite:///{path}"
    engine = make_engine(Settings(database_url=url))
    keys = {role: security.create_key(engine, name=f"{role}-key", role=role)
            for role in ("ingest", "read")}
    engine.dispose()
    server = LiveServer(url, env={"TALLYWARD_HTTP_HEADER_TIMEOUT_S": "1",
                                  "TALLYWARD_HTTP_BODY_TIMEOUT_S": "1",
                                  "TALLYWARD_HTTP_KEEP_ALIVE_S": "1",
                                  "TALLYWARD_HTTP_MAX_CONNECTIONS": "6",
                                  "TALLYWARD_HTTP_MAX_HEADER_BYTES": "4096"}).start()
    yield server, keys
    server.stop()


def post_head(key: str | None, *, length: int, extra: bytes = b"") -> bytes:
    auth_line = b"Authorization: Bearer " + key.encode() + b"\r\n" if key else b""
    return (b"POST /v1/counts HTTP/1.1\r\nHost: tallyward\r\nContent-Type: application/json\r\n"
            + auth_line + b"Content-Length: %d\r\n" % length + extra + b"\r\n")


def test_post_without_key_is_401_before_its_body_is_sent(live_server) -> None:
    """A POST announcing a 4 MB body but sending none gets 401 at once, with no 100 Continue:
    the server never asked for the body (the body deadline would answer 408 instead)."""
    response = exchange(live_server.port, post_head(None, length=4_000_000,
                                                    extra=b"Expect: 100-continue\r\n"))
    assert response.startswith(b"HTTP/1.1 401"), response[:200]
    assert b"100 Continue" not in response
    assert b'www-authenticate: bearer realm="tallyward"' in response.lower()


def test_post_with_unknown_key_is_401_before_its_body_is_sent(live_server) -> None:
    """An unknown key is refused before the body, like a missing one."""
    response = exchange(live_server.port, post_head("tw_madeup", length=4_000_000))
    assert status_of(response) == 401


def test_post_with_a_read_key_is_403_before_its_body_is_sent(live_server, keys) -> None:
    """A valid key whose role may not ingest is refused (403) without the body being read."""
    response = exchange(live_server.port, post_head(keys["read"], length=4_000_000))
    assert status_of(response) == 403 and b"ingest" in response


def test_slow_body_is_408_and_closed(tight_server) -> None:
    """A body that does not arrive in full within the body deadline gets 408 and a close."""
    server, keys = tight_server
    response = exchange(server.port, post_head(keys["ingest"], length=4000) + b'{"counts": [')
    assert status_of(response) == 408
    assert b"did not arrive within 1 seconds" in response


def test_slow_headers_are_408_and_closed(tight_server) -> None:
    """Headers that never finish get 408 after the header deadline, then a close."""
    server, _ = tight_server
    response = exchange(server.port, b"GET /v1/health HTTP/1.1\r\nHost: tallyward\r\n")
    assert status_of(response) == 408


def test_connection_that_sends_nothing_is_closed(tight_server) -> None:
    """A connection that never sends a byte is closed after the header deadline."""
    server, _ = tight_server
    assert exchange(server.port, b"") == b""


def test_idle_keep_alive_connection_is_closed(tight_server) -> None:
    """After a response, a keep-alive connection with no new request is closed."""
    server, _ = tight_server
    response = exchange(server.port, b"GET /v1/health HTTP/1.1\r\nHost: tallyward\r\n\r\n")
    assert status_of(response) == 200 and response.count(b"HTTP/1.1") == 1


def test_oversized_headers_are_431(tight_server) -> None:
    """Headers over the configured size get 431, whether sent at once or a piece at a time."""
    server, _ = tight_server
    big = b"GET /v1/health HTTP/1.1\r\nHost: tallyward\r\nX-Padding: " + b"a" * 8000 + b"\r\n\r\n"
    assert status_of(exchange(server.port, big)) == 431
    with socket.create_connection(("127.0.0.1", server.port), timeout=SOCKET_WAIT_S) as s:
        s.sendall(b"GET /v1/health HTTP/1.1\r\nHost: tallyward\r\nX-Padding: ")
        for _ in range(10):
            try:
                s.sendall(b"a" * 1000)
            except OSError:
                break
            time.sleep(0.01)
        response = s.recv(65536)
    assert status_of(response) == 431


def test_connections_over_the_limit_get_503(tight_server) -> None:
    """With the connection cap reached, a further request gets 503 at once; after the idle
    connections close, requests are served again."""
    server, _ = tight_server
    idle = [socket.create_connection(("127.0.0.1", server.port)) for _ in range(6)]
    try:
        request = b"GET /v1/health HTTP/1.1\r\nHost: tallyward\r\nConnection: close\r\n\r\n"
        assert status_of(exchange(server.port, request)) == 503
    finally:
        for s in idle:
            s.close()
    deadline = time.monotonic() + SOCKET_WAIT_S  # a bound on waiting, not a speed requirement
    while status_of(exchange(server.port, request)) != 200 and time.monotonic() < deadline:
        time.sleep(0.1)
    assert status_of(exchange(server.port, request)) == 200


def test_request_id_is_echoed_only_when_short_and_plain(tight_server) -> None:
    """A plain X-Request-Id of up to 64 characters is echoed; a long or odd one is replaced."""
    server, _ = tight_server
    with httpx.Client(base_url=server.url, timeout=SOCKET_WAIT_S) as c:
        assert c.get("/v1/health", headers={"X-Request-Id": "abc-123.X_y"}
                     ).headers["x-request-id"] == "abc-123.X_y"
        for offered in ("a" * 65, "id with spaces", "id;evil=1", "\xfc".encode("latin-1")):
            got = c.get("/v1/health", headers={"X-Request-Id": offered}).headers["x-request-id"]
            assert got != offered and re.fullmatch(r"[0-9a-f]{16}", got)
