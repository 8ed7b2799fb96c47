"""Baseline routes: fit, expected counts for a local day, and the planners' profile."""

from __future__ import annotations

import pytest

from service.timefmt import format_utc
from tests.conftest import auth
from tests.factories import load_network, small_network

DETS = ("bra3-nb-lt", "bra3-nb-t1", "bra3-nb-t2")


@pytest.fixture
def fitted(client, engine, keys):  # type: ignore[no-untyped-def]
    net = small_network(DETS)
    load_network(engine, net, until_s=net.test_start_s)
    r = client.post("/v1/baselines/fit", json={"as_of": format_utc(net.test_start_s)},
                    headers=auth(keys["admin"]))
    assert r.status_code == 200, r.text
    return net, r.json()


def test_fit_reports_each_detector(fitted) -> None:
    """Every detector of a 3-week history is fitted, with its baseline id."""
    _, body = fitted
    assert [d["status"] for d in body["data"]] == ["fitted"] * 3
    assert all(d["baseline_id"] for d in body["data"])


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
    r = client.post("/v1/baselines/fit", json={"as_of": format_utc(net.test_start_s)},
                    headers=auth(keys["admin"]))
    assert r.json()["data"][0]["status"] == "insufficient_history"
    assert r.json()["data"][0]["reason"]


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
