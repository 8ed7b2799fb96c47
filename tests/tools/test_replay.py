"""`tallyward replay`: time order, controller batches, retries, resumption and clear stops."""

from __future__ import annotations

import gzip
import io
import threading
import time

import orjson
import pytest
from sqlalchemy import func, select

from service.store import tables as models
from service.timefmt import parse_rfc3339
from service.tools.replay import ReplayError, replay
from tests.conftest import LiveServer
from tests.factories import count_items, make_detector


def write_feed(folder, rows, *, groups=None, gz=True):  # type: ignore[no-untyped-def]
    folder.mkdir(exist_ok=True)
    text = "detector_id,start,count\n" + "".join(f"{d},{s},{c}\n" for d, s, c in rows)
    if gz:
        (folder / "counts.csv.gz").write_bytes(gzip.compress(text.encode(), mtime=0))
    else:
        (folder / "counts.csv").write_text(text)
    if groups:
        feats = [{"type": "Feature", "geometry": None,
                  "properties": {"detector_id": d, "group": g}} for d, g in groups.items()]
        (folder / "detectors.geojson").write_bytes(orjson.dumps(
            {"type": "FeatureCollection", "features": feats}))
    return folder


def rows_for(dets, n):  # type: ignore[no-untyped-def]
    out = []
    for i in range(n):
        for d in dets:
            item = count_items(d, n=n)[i]
            out.append((d, item["start"], item["count"]))
    return out


def stored_count(engine) -> int:  # type: ignore[no-untyped-def]
    with engine.connect() as conn:
        return conn.execute(select(func.count()).select_from(models.counts)).scalar_one()


def test_replay_posts_every_row_in_controller_batches(live_server, engine, keys, tmp_path) -> None:
    """At a finite speed each controller (group) posts one batch per interval."""
    for d in ("A1", "A2", "B1"):
        make_detector(engine, d)
    feed = write_feed(tmp_path / "f", rows_for(["A1", "A2", "B1"], 6),
                      groups={"A1": "A", "A2": "A", "B1": "B"})
    summary = replay(feed, url=live_server.url, key=keys["ingest"], speed="100000x")
    assert summary.rows == 18 and summary.accepted == 18
    assert summary.batches == 12  # 6 intervals x 2 controllers
    assert stored_count(engine) == 18


def test_replay_at_max_speed_uses_large_batches_and_from_until(live_server, engine, keys,
                                                              tmp_path) -> None:
    """At max speed rows go in --batch sized posts; --from/--until select a time range."""
    make_detector(engine, "A1")
    rows = rows_for(["A1"], 20)
    feed = write_feed(tmp_path / "f", rows)
    part = replay(feed, url=live_server.url, key=keys["ingest"],
                  from_s=parse_rfc3339(rows[5][1]), until_s=parse_rfc3339(rows[10][1]))
    assert part.rows == 5 and part.accepted == 5
    summary = replay(feed, url=live_server.url, key=keys["ingest"], batch=7)
    assert summary.batches == 3 and summary.accepted == 15 and summary.duplicate == 5


def test_replay_stops_at_once_on_wrong_role(live_server, engine, keys, tmp_path) -> None:
    """A read-only key stops the replay with a message naming the role needed."""
    make_detector(engine, "A1")
    feed = write_feed(tmp_path / "f", rows_for(["A1"], 3))
    with pytest.raises(ReplayError, match="ingest"):
        replay(feed, url=live_server.url, key=keys["read"])
    with pytest.raises(ReplayError, match="401"):
        replay(feed, url=live_server.url, key="tw_wrong")


def test_replay_reports_rejected_rows_and_continues(live_server, engine, keys, tmp_path) -> None:
    """Rows for an unknown detector are printed and counted; the rest are stored."""
    make_detector(engine, "A1")
    rows = rows_for(["A1"], 5) + [("GHOST", rows_for(["A1"], 5)[0][1], 3)]
    out = io.StringIO()
    summary = replay(write_feed(tmp_path / "f", rows), url=live_server.url, key=keys["ingest"],
                     out=out)
    assert summary.accepted == 5 and summary.rejected == 1
    assert "GHOST" in out.getvalue()


def test_replay_names_the_line_of_a_malformed_feed(live_server, engine, keys, tmp_path) -> None:
    """A malformed row stops the replay with its line number."""
    make_detector(engine, "A1")
    rows = rows_for(["A1"], 3) + [("A1", "not-a-time", 4)]
    with pytest.raises(ReplayError, match="line 5"):
        replay(write_feed(tmp_path / "f", rows, gz=False), url=live_server.url, key=keys["ingest"])


def test_replay_says_a_gzip_feed_is_truncated(live_server, engine, keys, tmp_path) -> None:
    """A cut-off .csv.gz is reported as truncated, with how far it got."""
    make_detector(engine, "A1")
    feed = write_feed(tmp_path / "f", rows_for(["A1"], 200))
    data = (feed / "counts.csv.gz").read_bytes()
    (feed / "counts.csv.gz").write_bytes(data[: len(data) // 2])
    with pytest.raises(ReplayError, match="truncated"):
        replay(feed, url=live_server.url, key=keys["ingest"])


def test_replay_waits_for_a_stopped_server_then_resumes_without_duplicates(database_url, engine,
                                                                           keys, tmp_path) -> None:
    """With the server down the replay retries with backoff; once it is back every row is
    stored exactly once."""
    make_detector(engine, "A1")
    feed = write_feed(tmp_path / "f", rows_for(["A1"], 30))
    server = LiveServer(database_url)
    url = server.url
    starter = threading.Timer(2.0, server.start)
    starter.start()
    try:
        out = io.StringIO()
        summary = replay(feed, url=url, key=keys["ingest"], batch=10, out=out, max_wait_s=60)
        assert summary.retries >= 1 and "retrying" in out.getvalue()
        assert summary.accepted + summary.duplicate == 30
        assert stored_count(engine) == 30
    finally:
        starter.join()
        server.stop()


def test_replay_gives_up_with_resume_hint(engine, keys, tmp_path) -> None:
    """Against nothing listening, the replay gives up and says where to resume."""
    make_detector(engine, "A1")
    feed = write_feed(tmp_path / "f", rows_for(["A1"], 3))
    started = time.monotonic()
    with pytest.raises(ReplayError, match="--from"):
        replay(feed, url="http://127.0.0.1:9", key=keys["ingest"], max_wait_s=1.0,
               out=io.StringIO())
    assert time.monotonic() - started < 30


def test_read_feed_reads_what_import_counts_reads(tmp_path) -> None:
    """The feed reader is the product's CSV reader: BOM, CRLF, blank lines and column order
    are accepted, and line numbers count the header as line 1."""
    from service.tools.replay import read_feed

    path = tmp_path / "counts.csv"
    path.write_bytes(b"\xef\xbb\xbfcount,start,detector_id\r\n"
                     b"7,2026-11-16T06:00:00Z,A1\r\n\r\n"
                     b"9,2026-11-16T06:05:00Z,A1\r\n")
    rows = list(read_feed(path))
    assert rows == [(2, "A1", "2026-11-16T06:00:00Z", parse_rfc3339("2026-11-16T06:00:00Z"), 7),
                    (4, "A1", "2026-11-16T06:05:00Z", parse_rfc3339("2026-11-16T06:05:00Z"), 9)]


def test_read_feed_names_the_line_of_a_short_row_and_of_a_bad_header(tmp_path) -> None:
    """A row with too few fields, or a header without the three columns, stops with its line."""
    from service.tools.replay import read_feed

    path = tmp_path / "counts.csv"
    path.write_text("detector_id,start,count\nA1,2026-11-16T06:00:00Z,7\nA1,oops\n")
    with pytest.raises(ReplayError, match=r"line 3: malformed row \(has 2 field"):
        list(read_feed(path))
    path.write_text("detector,start,count\nA1,2026-11-16T06:00:00Z,7\n")
    with pytest.raises(ReplayError, match="line 1: .*detector_id"):
        list(read_feed(path))
