"""Quality flags that say what people declared about the counts: a count replaced by an admin
correction is flagged `corrected`, and a count whose start lies in a period its detector was
out of service is flagged `out_of_service`, in JSON and CSV alike. The clean volumes impute
the out-of-service intervals and take corrected counts as observed."""

from __future__ import annotations

import csv
import io
from collections.abc import Iterator

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import delete, select

from service.config import Settings
from service.store import tables
from service.timefmt import format_utc
from service.web.app import create_app
from tests.conftest import auth
from tests.factories import make_detector
from tests.web.test_figures import DETS, _alert, fitted  # noqa: F401  (fitted is a fixture)

START_S = 1_794_838_500  # 2026-11-16T14:15:00Z
DET = "bra3-nb-t1"
HOUR = 3600


def post_counts(client, keys, rows: list[tuple[str, int, int]]) -> None:  # type: ignore[no-untyped-def]
    r = client.post("/v1/counts", headers=auth(keys["ingest"]), json={"counts": [
        {"detector_id": d, "start": format_utc(t), "count": c} for d, t, c in rows]})
    assert r.status_code == 200, r.text


def counts_json(client, keys, detector_id: str, **params) -> list[tuple[int, int, str]]:  # type: ignore[no-untyped-def]
    r = client.get("/v1/counts", params={"detector_id": detector_id, "limit": 100_000, **params},
                   headers=auth(keys["read"]))
    assert r.status_code == 200, r.text
    return [(row["start"], row["count"], row["flag"]) for row in r.json()["data"]]


def counts_csv(client, keys, detector_id: str, **params) -> list[list[str]]:  # type: ignore[no-untyped-def]
    r = client.get("/v1/counts", params={"detector_id": detector_id, "limit": 100_000, **params},
                   headers={**auth(keys["read"]), "Accept": "text/csv"})
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/csv"), r.text
    return list(csv.reader(io.StringIO(r.text)))


def correct(client, keys, detector_id: str, start_s: int, count: int) -> dict:  # type: ignore[type-arg, no-untyped-def]
    r = client.post("/v1/counts/corrections", headers=auth(keys["admin"]),
                    json={"detector_id": detector_id, "start": format_utc(start_s),
                          "count": count, "reason": "manual count from the tube survey"})
    assert r.status_code == 201, r.text
    return r.json()


# ---------------------------------------------------------------------------- corrected


def test_corrected_count_is_flagged_corrected_in_json_and_csv(client, engine, keys) -> None:
    """Correcting one stored count through the API flags that count `corrected` (with its
    new value) in JSON and in CSV; its neighbors stay `ok`."""
    make_detector(engine, "D1")
    post_counts(client, keys, [("D1", START_S + i * 300, 40 + i) for i in range(3)])
    correct(client, keys, "D1", START_S + 300, 7)
    assert counts_json(client, keys, "D1") == [
        (format_utc(START_S), 40, "ok"), (format_utc(START_S + 300), 7, "corrected"),
        (format_utc(START_S + 600), 42, "ok")]
    assert counts_csv(client, keys, "D1") == [
        ["detector_id", "start", "count", "flag"],
        ["D1", format_utc(START_S), "40", "ok"],
        ["D1", format_utc(START_S + 300), "7", "corrected"],
        ["D1", format_utc(START_S + 600), "42", "ok"]]


def test_corrected_comes_before_alert_and_evidence_flags(client, engine, keys) -> None:
    """A corrected count inside an alert episode, or one the scorer's evidence flagged, is
    flagged `corrected`: a person checked it, and the clean volumes use it as observed."""
    make_detector(engine, "D1")
    post_counts(client, keys, [("D1", START_S + i * 300, 0) for i in range(4)])
    _alert(engine, "D1", START_S, START_S + 900)
    with engine.begin() as conn:
        conn.execute(tables.evidence.insert().values(detector_id="D1", start_s=START_S + 900,
                                                     kind="zero_counts", log_p=-20.0))
    correct(client, keys, "D1", START_S + 300, 31)
    flags = [f for _, _, f in counts_json(client, keys, "D1")]
    assert flags == ["alert:zero_counts", "corrected", "alert:zero_counts", "alert:zero_counts"]


# ---------------------------------------------------------------------------- out of service


@pytest.fixture
def data_clock_client(database_url, engine) -> Iterator[TestClient]:  # type: ignore[no-untyped-def]
    """The service on the data clock (as in a replay): periods open and close just after the
    latest interval stored when the state changes."""
    settings = Settings(database_url=database_url, clock="data", scoring="off")
    with TestClient(create_app(settings, engine=engine)) as c:
        yield c


def set_state(client, keys, state: str, **body) -> dict:  # type: ignore[type-arg, no-untyped-def]
    r = client.patch(f"/v1/detectors/{DET}", headers=auth(keys["operate"]),
                     json={"state": state, **body})
    assert r.status_code == 200, r.text
    return r.json()["service"]


@pytest.fixture
def repaired(data_clock_client, engine, keys, fitted):  # type: ignore[no-untyped-def]  # noqa: F811
    """The test day of three fitted detectors, posted through the API in three parts: hours
    0-2 in service, hours 2-3 with DET out of service (loop replacement), hours 3-6 back in
    service. Returns the client, the day's first start and DET's posted counts by start."""
    client, t0 = data_clock_client, fitted.test_start_s
    c = tables.counts
    with engine.begin() as conn:
        rows = [tuple(r) for r in conn.execute(
            select(c.c.detector_id, c.c.start_s, c.c.count)
            .where(c.c.detector_id.in_(DETS), c.c.start_s >= t0, c.c.start_s < t0 + 6 * HOUR)
            .order_by(c.c.start_s, c.c.detector_id))]
        conn.execute(delete(c).where(c.c.detector_id.in_(DETS), c.c.start_s >= t0))

    def part(lo: int, hi: int) -> None:
        post_counts(client, keys, [r for r in rows if t0 + lo * HOUR <= r[1] < t0 + hi * HOUR])

    part(0, 2)
    assert set_state(client, keys, "out_of_service",
                     reason="loop replacement, WO 2211")["state"] == "out_of_service"
    part(2, 3)
    assert set_state(client, keys, "in_service")["state"] == "in_service"
    part(3, 6)
    return client, t0, {t: n for d, t, n in rows if d == DET}


def test_counts_inside_an_out_of_service_period_are_flagged_and_none_after(
        repaired, keys) -> None:
    """Counts posted while the detector was out of service are flagged `out_of_service` (JSON
    and CSV), those before and after it `ok`; the flags stay after it is back in service."""
    client, t0, posted = repaired
    rows = counts_json(client, keys, DET, **{"from": format_utc(t0)})
    assert len(rows) == 72 and [n for _, n, _ in rows] == [posted[t] for t in sorted(posted)]
    inside = {format_utc(t0 + 2 * HOUR + i * 300) for i in range(12)}
    assert [s for s, _, f in rows if f == "out_of_service"] == sorted(inside)
    assert all(f == "ok" for s, _, f in rows if s not in inside)
    table = counts_csv(client, keys, DET, **{"from": format_utc(t0)})
    assert [r[3] for r in table[1:]] == [f for _, _, f in rows]
    other = counts_json(client, keys, "bra3-nb-t2", **{"from": format_utc(t0)})
    assert {f for _, _, f in other} == {"ok"}  # the period is DET's alone


def test_clean_volumes_impute_the_out_of_service_hour(repaired, keys) -> None:
    """The hour out of service is imputed (observed 0, imputed share 1, an interval around the
    estimate); the hours before and after are their observed sums."""
    client, t0, posted = repaired
    r = client.get(f"/v1/detectors/{DET}/volumes", headers=auth(keys["read"]), params={
        "from": format_utc(t0), "to": format_utc(t0 + 6 * HOUR), "step": "hour"})
    assert r.status_code == 200, r.text
    hours = r.json()["data"]
    assert [h["imputed_share"] for h in hours] == [0.0, 0.0, 1.0, 0.0, 0.0, 0.0]
    for i, h in enumerate(hours):
        if i == 2:
            assert h["imputed"] and h["observed"] == 0 and h["low"] <= h["volume"] <= h["high"]
            assert h["high"] > h["low"]
        else:
            observed = sum(n for t, n in posted.items() if t0 + i * HOUR <= t < t0 + (i + 1) * HOUR)
            assert not h["imputed"] and h["volume"] == h["observed"] == observed
    assert r.json()["imputed_share"] == pytest.approx(1 / 6, abs=1e-3)


def test_corrected_count_in_the_period_is_used_as_observed(repaired, keys) -> None:
    """Correcting one count inside the out-of-service hour flags it `corrected`, and the clean
    volumes take its corrected value as observed: 11 of the hour's 12 intervals are imputed."""
    client, t0, _ = repaired
    start_s = t0 + 2 * HOUR + 600
    correct(client, keys, DET, start_s, 123)
    flags = {s: f for s, _, f in counts_json(client, keys, DET, **{"from": format_utc(t0)})}
    assert flags[format_utc(start_s)] == "corrected"
    assert flags[format_utc(start_s - 300)] == flags[format_utc(start_s + 300)] == \
        "out_of_service"
    r = client.get(f"/v1/detectors/{DET}/volumes", headers=auth(keys["read"]), params={
        "from": format_utc(t0 + 2 * HOUR), "to": format_utc(t0 + 3 * HOUR), "step": "hour"})
    (hour,) = r.json()["data"]
    assert hour["observed"] == 123 and hour["imputed_share"] == pytest.approx(11 / 12, abs=1e-3)


def test_service_periods_are_listed_newest_first(repaired, keys) -> None:
    """GET /v1/detectors/{id}/service-periods lists the period with its reason, who took the
    detector out and who returned it; its bounds are the first flagged start and the first
    start after it. An unknown detector is a 404 and a read key may list them."""
    client, t0, _ = repaired
    r = client.get(f"/v1/detectors/{DET}/service-periods", headers=auth(keys["read"]))
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["detector_id"] == DET and len(body["periods"]) == 1
    period = body["periods"][0]
    assert period["reason"] == "loop replacement, WO 2211"
    assert period["by"] and period["closed_by"] == period["by"]
    assert format_utc(t0 + 2 * HOUR - 300) < period["from"] <= format_utc(t0 + 2 * HOUR)
    assert format_utc(t0 + 3 * HOUR - 300) < period["until"] <= format_utc(t0 + 3 * HOUR)
    other = client.get("/v1/detectors/bra3-nb-t2/service-periods", headers=auth(keys["read"]))
    assert other.status_code == 200 and other.json()["periods"] == []
    missing = client.get("/v1/detectors/nope-1/service-periods", headers=auth(keys["read"]))
    assert missing.status_code == 404 and "unknown detector" in missing.json()["message"]
