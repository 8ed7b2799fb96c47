"""Planners' routes: quality flags on counts, clean volumes (JSON and CSV), the annual figures
of a detector and a group, D for two directions, the baseline's validity warning, and bad
input as clear 4xx answers."""

from __future__ import annotations

import time

import pytest
from sqlalchemy import delete, insert, select

from service.store import tables
from service.timefmt import format_utc
from tests.conftest import auth
from tests.factories import load_network, small_network
from tests.web.test_baselines import fit_job

DETS = ("bra3-nb-lt", "bra3-nb-t1", "bra3-nb-t2")


_FITTED: list[dict] = []  # baselines fitted once by the first test, stored again by the others


@pytest.fixture
def fitted(client, engine, keys):  # type: ignore[no-untyped-def]
    """Three detectors of one group with three weeks of counts and fitted baselines (the fit
    runs through the API once; later tests store the same fitted rows, to save minutes)."""
    net = small_network(DETS, history_days=21, test_days=1)
    load_network(engine, net)
    b = tables.baselines
    if not _FITTED:
        job = fit_job(client, keys, {"as_of": format_utc(net.test_start_s)})
        assert job["state"] == "done", job
        with engine.connect() as conn:
            _FITTED.extend(dict(row._mapping) for row in conn.execute(select(b)))
    else:
        with engine.begin() as conn:
            conn.execute(insert(b), [{k: v for k, v in row.items() if k != "baseline_id"}
                                     for row in _FITTED])
    return net


def _group(client, keys) -> str:  # type: ignore[no-untyped-def]
    det = client.get("/v1/detectors/bra3-nb-t1", headers=auth(keys["read"])).json()
    return det["group"]


def _alert(engine, detector_id: str, start_s: int, end_s: int, *, cause: str = "detector"
           ) -> None:  # type: ignore[no-untyped-def]
    now = time.time()
    with engine.begin() as conn:
        conn.execute(insert(tables.alerts).values(
            seq=int(start_s), subject=detector_id, detector_id=detector_id, kind="zero_counts",
            cause=cause, status="closed", withdrawn=0, start_s=start_s, end_s=end_s,
            n_intervals=(end_s - start_s) // 300 + 1, summary="test episode", created_s=now,
            updated_s=now))


def test_counts_carry_quality_flags(client, engine, keys, fitted) -> None:
    """Each stored count says ok, or the alert episode it lies in (alert:<kind>), or the kind
    of lone evidence that flagged it."""
    t0 = fitted.test_start_s
    _alert(engine, "bra3-nb-t1", t0, t0 + 600)
    with engine.begin() as conn:
        conn.execute(insert(tables.evidence).values(detector_id="bra3-nb-t1", start_s=t0 + 1800,
                                                    kind="high_volume", log_p=-20.0))
    r = client.get("/v1/counts", params={"detector_id": "bra3-nb-t1", "from": format_utc(t0),
                                         "limit": 8}, headers=auth(keys["read"]))
    assert r.status_code == 200, r.text
    flags = [row["flag"] for row in r.json()["data"]]
    assert flags == ["alert:zero_counts"] * 3 + ["ok"] * 3 + ["high_volume", "ok"]


def test_volumes_by_hour_impute_gaps_and_replaced_intervals(client, engine, keys, fitted) -> None:
    """A fully counted hour is its counts' sum; an hour with deleted counts and one inside a
    detector alert are imputed, with low <= volume <= high and their imputed share."""
    t0 = fitted.test_start_s  # a local midnight
    with engine.begin() as conn:
        conn.execute(delete(tables.counts).where(
            tables.counts.c.detector_id == "bra3-nb-t1", tables.counts.c.start_s >= t0 + 3600,
            tables.counts.c.start_s < t0 + 3600 + 1800))
    _alert(engine, "bra3-nb-t1", t0 + 7200, t0 + 7200 + 3300)
    r = client.get("/v1/detectors/bra3-nb-t1/volumes",
                   params={"from": format_utc(t0), "to": format_utc(t0 + 4 * 3600),
                           "step": "hour"}, headers=auth(keys["read"]))
    assert r.status_code == 200, r.text
    body = r.json()
    hours = body["data"]
    assert len(hours) == 4 and body["step"] == "hour"
    counts = client.get("/v1/counts", params={"detector_id": "bra3-nb-t1",
                                              "from": format_utc(t0), "limit": 12},
                        headers=auth(keys["read"])).json()["data"]
    assert hours[0]["volume"] == hours[0]["observed"] == sum(c["count"] for c in counts)
    assert not hours[0]["imputed"] and hours[0]["low"] == hours[0]["high"] == hours[0]["volume"]
    assert hours[1]["imputed"] and hours[1]["imputed_share"] == 0.5
    assert hours[2]["imputed_share"] == 1.0 and hours[2]["observed"] == 0
    for h in hours[1:3]:
        assert h["low"] <= h["volume"] <= h["high"] and h["high"] > h["low"]
    assert body["imputed_share"] == pytest.approx(18 / 48, abs=1e-3)


def test_volumes_csv_and_group_sum(client, keys, fitted) -> None:
    """Accept: text/csv gives the same buckets as CSV; a group's volume is its members' sum."""
    t0 = fitted.test_start_s
    params = {"from": format_utc(t0), "to": format_utc(t0 + 86400), "step": "day"}
    h = auth(keys["read"])
    csv_text = client.get("/v1/detectors/bra3-nb-t1/volumes", params=params,
                          headers={**h, "Accept": "text/csv"})
    assert csv_text.headers["content-type"].startswith("text/csv")
    lines = csv_text.text.splitlines()
    assert lines[0] == "start,volume,observed,imputed,imputed_share,low,high,intervals"
    assert len(lines) == 2 and lines[1].split(",")[3] in ("true", "false")
    group = _group(client, keys)
    members = client.get("/v1/detectors", params={"group": group}, headers=h).json()["data"]
    each = [client.get(f"/v1/detectors/{m['detector_id']}/volumes", params=params,
                       headers=h).json()["data"][0]["volume"] for m in members]
    total = client.get(f"/v1/groups/{group}/volumes", params=params, headers=h).json()
    assert total["subject"] == f"group:{group}"
    assert total["data"][0]["volume"] == pytest.approx(sum(each), abs=0.2)


def test_figures_of_a_detector_say_how_much_was_imputed(client, keys, fitted) -> None:
    """Three weeks of counts in a year: the figures come with intervals, the days behind
    them, the share imputed and the AASHTO sufficiency rule reported as not met."""
    r = client.get("/v1/detectors/bra3-nb-t1/figures", params={"year": 2026},
                   headers=auth(keys["read"]))
    assert r.status_code == 200, r.text
    f = r.json()
    assert f["days"]["in_period"] == 365 and 20 <= f["days"]["with_data"] <= 23
    assert f["imputed_share"] > 0.9 and f["sufficiency"]["meets_rule"] is False
    for name in ("aadt", "adt", "hv30", "k30", "dhv"):
        assert f[name]["low"] <= f[name]["value"] <= f[name]["high"], name
    assert 0.05 < f["k30"]["value"] < 0.2 and isinstance(f["aadt"]["value"], int)
    wk = f["peak_hours"]["weekday"]
    assert wk["am"]["start"] < "12:00" <= wk["pm"]["start"]
    assert 0.25 <= wk["pm"]["phf"] <= 1.0 and wk["pm"]["days"] >= 10
    assert len(f["monthly_factors"]) == 12 and len(f["day_of_week_factors"]) == 7
    assert "Traffic Monitoring Guide" in f["methods"]["aadt"]


def test_group_figures_and_directional_distribution(client, engine, keys, fitted) -> None:
    """A group's AADT is about its members' sum; D of two groups lies in [0.5, 1]."""
    h = auth(keys["read"])
    group = _group(client, keys)
    g = client.get(f"/v1/groups/{group}/figures", params={"year": 2026}, headers=h).json()
    assert g["subject"] == f"group:{group}" and len(g["detectors"]) == 3
    singles = [client.get(f"/v1/detectors/{d}/figures", params={"year": 2026},
                          headers=h).json()["aadt"]["value"] for d in g["detectors"]]
    assert g["aadt"]["value"] == pytest.approx(sum(singles), rel=0.01)
    with engine.begin() as conn:  # split the lanes into two "directions"
        conn.execute(tables.detectors.update().where(
            tables.detectors.c.detector_id == "bra3-nb-lt").values(group_id="OPPOSITE"))
    d = client.get(f"/v1/groups/{group}/directional",
                   params={"year": 2026, "opposite": "OPPOSITE"}, headers=h)
    assert d.status_code == 200, d.text
    body = d.json()
    assert 0.5 <= body["d"]["low"] <= body["d"]["value"] <= body["d"]["high"] <= 1.0
    assert body["peak_direction"] in (group, "OPPOSITE")


@pytest.mark.parametrize(("path", "params", "status", "says"), [
    ("/v1/detectors/bra3-nb-t1/figures", {"year": 2019}, 422, "no counts in 2019"),
    ("/v1/detectors/bra3-nb-t1/figures", {"year": 1800}, 422, ""),
    ("/v1/detectors/bra3-nb-t1/volumes", {"from": "2026-11-20T00:00:00Z",
                                          "to": "2026-11-19T00:00:00Z"}, 422, "before"),
    ("/v1/detectors/bra3-nb-t1/volumes", {"from": "2026-11-19T00:00:00Z",
                                          "to": "2026-11-20T00:00:00Z", "step": "week"}, 422,
     "15min, hour or day"),
    ("/v1/groups/NOBODY/figures", {"year": 2026}, 404, "no member"),
    ("/v1/groups/NOBODY/volumes", {"from": "2026-11-19T00:00:00Z",
                                   "to": "2026-11-20T00:00:00Z"}, 404, "no member"),
    ("/v1/detectors/NOPE/figures", {"year": 2026}, 404, "unknown detector"),
])
def test_bad_planning_requests_are_clear_4xx(client, keys, fitted, path, params, status,
                                             says) -> None:
    """A year with no data, a period ending before it starts, a step not offered, a group
    without members, an unknown detector: each a 4xx JSON error saying what was wrong."""
    r = client.get(path, params=params, headers=auth(keys["read"]))
    assert r.status_code == status, r.text
    assert says in r.json().get("message", str(r.json()))


def test_baseline_day_far_beyond_its_window_warns(client, keys, fitted) -> None:
    """A date more than the configured validity past the fit window is served with a
    warning field and the X-Baseline-Warning header; a date inside it is not."""
    h = auth(keys["read"])
    near = client.get("/v1/detectors/bra3-nb-t1/baseline", params={"date": "2026-11-01"},
                      headers=h)
    assert near.json()["warning"] is None and "x-baseline-warning" not in near.headers
    far = client.get("/v1/detectors/bra3-nb-t1/baseline", params={"date": "2027-06-01"},
                     headers=h)
    assert far.status_code == 200
    assert "days after the baseline's fit window" in far.json()["warning"]
    assert far.headers["x-baseline-warning"] == far.json()["warning"]


def test_profile_names_the_busiest_hour_share_and_rounds(client, keys, fitted) -> None:
    """The profile's hour is the busiest expected hour with its share of the expected day
    (not called K), with volumes to 3 significant figures."""
    r = client.get("/v1/detectors/bra3-nb-t1/baseline/profile", headers=auth(keys["read"]))
    wk = r.json()["day_types"]["weekday"]
    assert "share_of_expected_day" in wk["busiest_hour"] and "peak_hour" not in wk
    daily = wk["daily_volume"]
    assert daily == float(f"{daily:.3g}")


def test_web_view_shows_a_detectors_figures_with_the_share_imputed(client, keys,
                                                                  fitted) -> None:
    """The planners' page of the web view shows the same figures as the API (AADT with its
    interval, K30, the share imputed, the sufficiency rule, AM/PM peak-hour factors, the
    factors), links back to the day; a bad year is a 400 page, an unknown detector a 404, a
    year without counts says so, and without a session it redirects to the sign-in."""
    path = "/ui/detectors/bra3-nb-t1/figures"
    assert client.get(path, follow_redirects=True).url.path == "/ui/login"
    api = client.get("/v1/detectors/bra3-nb-t1/figures", params={"year": 2026},
                     headers=auth(keys["read"])).json()
    r = client.post("/ui/login", data={"key": keys["read"], "next": path},
                    follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == path
    page = client.get(path, params={"year": 2026})
    assert page.status_code == 200, page.text
    text = page.text
    aadt = api["aadt"]
    assert f'{aadt["value"]:,}' in text and f'{aadt["low"]:,} to {aadt["high"]:,}' in text
    assert f'{api["k30"]["value"]:.3f}' in text
    assert f'{api["imputed_share"]:.1%} of the volume is imputed' in text
    assert "Data sufficiency rule: not met" in text
    pm = api["peak_hours"]["weekday"]["pm"]
    assert f'{pm["phf"]:.2f} ({pm["phf_low"]:.2f} to {pm["phf_high"]:.2f})' in text
    assert "Monthly factors" in text and "Day-of-week factors" in text
    assert 'href="/ui/detectors/bra3-nb-t1"' in text
    day = client.get("/ui/detectors/bra3-nb-t1")
    assert 'href="/ui/detectors/bra3-nb-t1/figures"' in day.text
    bad = client.get(path, params={"year": "20x6"})
    assert bad.status_code == 400 and "is not a year 1990..2100" in bad.text
    assert client.get("/ui/detectors/nope-1/figures").status_code == 404
    empty = client.get(path, params={"year": 2019})
    assert empty.status_code == 200 and "No figures for 2019" in empty.text
