"""Baseline routes: fit, expected counts for a local day, and the planners' profile."""

from __future__ import annotations

import time

import pytest

from service.timefmt import format_utc
from tests.conftest import auth
from tests.factories import load_network, small_network

DETS = ("bra3-nb-lt", "bra3-nb-t1", "bra3-nb-t2")


JOB_WAIT_S = 300  # a bound on waiting for the inline runner, not a speed requirement


def fit_job(client, keys, body):  # type: ignore[no-untyped-def]
    """POST a fit (202 with a job id), then poll the job until it is done; the job."""
    r = client.post("/v1/baselines/fit", json=body, headers=auth(keys["admin"]))
    assert r.status_code == 202, r.text
    href = r.json()["href"]
    assert r.headers["location"] == href == f"/v1/jobs/{r.json()['id']}"
    deadline = time.monotonic() + JOB_WAIT_S
    while True:
        job = client.get(href, headers=auth(keys["read"])).json()
        if job["state"] == "done" or time.monotonic() > deadline:
            return job
        time.sleep(0.1)


@pytest.fixture
def fitted(client, engine, keys):  # type: ignore[no-untyped-def]
    net = small_network(DETS)
    load_network(engine, net, until_s=net.test_start_s)
    job = fit_job(client, keys, {"as_of": format_utc(net.test_start_s)})
    assert job["state"] == "done", job
    return net, job


def test_fit_reports_each_detector(fitted) -> None:
    """A fit job fits every detector of a 3-week history: progress 3/3, each with its
    baseline id, in the order of the registry."""
    net, job = fitted
    assert job["progress"] == {"done": 3, "total": 3}
    assert [d["detector_id"] for d in job["results"]] == sorted(DETS)
    assert [d["status"] for d in job["results"]] == ["fitted"] * 3
    assert all(d["baseline_id"] for d in job["results"])
    assert job["as_of"] == format_utc(net.test_start_s) and job["finished"]


def test_baseline_for_a_date_gives_every_interval_with_band(client, keys, fitted) -> None:
    """A local weekday has 288 five-minute intervals, each with low <= expected <= high."""
    r = client.get("/v1/detectors/bra3-nb-t1/baseline", params={"date": "2026-11-17"},
                   headers=auth(keys["read"]))
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["day_type"] == "weekday" and len(body["data"]) == 288
    assert body["data"][0]["start"] == "2026-11-17T00:00:00-06:00"
    assert all(p["low"] <= p["expected"] <= p["high"] for p in body["data"])
    peak = max(body["data"], key=lambda p: p["expected"])
    assert peak["expected"] > 5 * min(p["expected"] for p in body["data"])
    assert body["model"]["baseline_id"] and body["model"]["days_used"] >= 10


def test_baseline_dst_day_has_25_hours(client, keys, fitted) -> None:
    """On the fall-back day the local day has 300 five-minute intervals."""
    r = client.get("/v1/detectors/bra3-nb-t1/baseline", params={"date": "2026-11-01"},
                   headers=auth(keys["read"]))
    assert len(r.json()["data"]) == 300 and r.json()["day_type"] == "sunday_holiday"


def test_baseline_by_day_type_and_level(client, keys, fitted) -> None:
    """?day_type= serves a generic day; a wider level gives a wider band."""
    h = auth(keys["read"])
    narrow = client.get("/v1/detectors/bra3-nb-t1/baseline",
                        params={"day_type": "saturday", "level": 0.6}, headers=h).json()
    wide = client.get("/v1/detectors/bra3-nb-t1/baseline",
                      params={"day_type": "saturday", "level": 0.99}, headers=h).json()
    assert narrow["data"][100]["start"] == "08:20"
    assert sum(p["high"] - p["low"] for p in wide["data"]) > \
        sum(p["high"] - p["low"] for p in narrow["data"])


def test_profile_gives_daily_volume_and_peak_hour(client, keys, fitted) -> None:
    """The planners' profile names the daily volume, peak hour and its share per day type."""
    r = client.get("/v1/detectors/bra3-nb-t1/baseline/profile", headers=auth(keys["read"]))
    assert r.status_code == 200, r.text
    assert set(r.json()["day_types"]) >= {"weekday", "saturday", "sunday_holiday"}


@pytest.mark.parametrize("params", [{}, {"date": "2026-11-17", "day_type": "weekday"},
                                    {"date": "2026-13-01"}, {"day_type": "monday"},
                                    {"date": "2026-11-17", "level": "1.5"}])
def test_baseline_bad_query_is_422(client, keys, fitted, params) -> None:
    """Neither or both of date/day_type, a bad date or level: a clear 422."""
    r = client.get("/v1/detectors/bra3-nb-t1/baseline", params=params, headers=auth(keys["read"]))
    assert r.status_code == 422, r.text


def test_baseline_of_unfitted_or_unknown_detector_is_404(client, engine, keys) -> None:
    """No baseline yet, or no such detector: 404 saying so."""
    from tests.factories import make_detector

    make_detector(engine, "NEW1")
    r = client.get("/v1/detectors/NEW1/baseline", params={"day_type": "weekday"},
                   headers=auth(keys["read"]))
    assert r.status_code == 404 and "fit" in r.json()["message"]
    assert client.get("/v1/detectors/NOPE/baseline/profile",
                      headers=auth(keys["read"])).status_code == 404


def test_fit_with_too_little_history_says_so(client, engine, keys) -> None:
    """A detector with two days of counts is insufficient_history, not an error."""
    net = small_network(("bra3-nb-lt",), history_days=2, test_days=1)
    load_network(engine, net, until_s=net.test_start_s)
    job = fit_job(client, keys, {"as_of": format_utc(net.test_start_s)})
    assert job["results"][0]["status"] == "insufficient_history"
    assert job["results"][0]["reason"]


@pytest.mark.parametrize("day", ["9999-12-31", "0001-01-01", "1989-12-31", "2101-01-01"])
def test_baseline_date_outside_the_served_range_is_422(client, keys, day) -> None:
    """Dates outside 1990-01-01..2100-12-31 get a 422 naming the range, before any lookup."""
    r = client.get("/v1/detectors/bra3-nb-t1/baseline", params={"date": day},
                   headers=auth(keys["read"]))
    assert r.status_code == 422 and "1990-01-01..2100-12-31" in r.json()["message"]


def test_baseline_dates_at_either_end_of_the_range_are_served(client, keys, fitted) -> None:
    """The first and last served dates each give a full local day."""
    for day in ("1990-01-01", "2100-12-31"):
        r = client.get("/v1/detectors/bra3-nb-t1/baseline", params={"date": day},
                       headers=auth(keys["read"]))
        assert r.status_code == 200, r.text
        assert len(r.json()["data"]) == 288 and r.json()["data"][0]["start"].startswith(day)


@pytest.mark.parametrize("day", ["2026-11-17\x00", "20261117", "2026-02-30", "x" * 5000])
def test_baseline_malformed_date_is_422(client, keys, day) -> None:
    """A date that is not YYYY-MM-DD is a 422 before any lookup."""
    r = client.get("/v1/detectors/bra3-nb-t1/baseline", params={"date": day},
                   headers=auth(keys["read"]))
    assert r.status_code == 422 and "YYYY-MM-DD" in r.json()["message"]


def test_unknown_job_id_is_404_saying_what_a_job_id_is(client, keys) -> None:
    """A job id that does not exist, or is not one at all, is a 404 that says what job ids
    are; never a 500."""
    for job_id in ("0" * 32, "not-a-job", "ABCDEF" * 6):
        r = client.get(f"/v1/jobs/{job_id}", headers=auth(keys["read"]))
        assert r.status_code == 404, r.text
        assert r.json()["error"] == "not_found" and "POST /v1/baselines/fit" in r.json()["message"]


def test_fit_of_an_unknown_detector_is_404_and_queues_nothing(client, engine, keys) -> None:
    """Naming a detector that is not registered is refused before a job is made."""
    from sqlalchemy import func, select

    from service.store import tables

    r = client.post("/v1/baselines/fit", json={"detector_ids": ["NOPE-1"]},
                    headers=auth(keys["admin"]))
    assert r.status_code == 404 and "NOPE-1" in r.json()["message"]
    with engine.connect() as conn:
        assert conn.execute(select(func.count()).select_from(tables.jobs)).scalar_one() == 0
