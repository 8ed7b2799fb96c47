"""The demo's evaluation matches alerts to injected truth, group alerts included."""

from __future__ import annotations

from service.tools.evaluate import evaluate

TRUTH = {
    "test": {"start": "2026-11-16T06:00:00Z", "end": "2026-11-18T06:00:00Z"},
    "injections": [
        {"id": "T10", "period": "test", "kind": "low_volume", "cause": "traffic",
         "group": "orx-eb", "detector_ids": ["orx-eb-s2", "orx-eb-s3"],
         "start": "2026-11-16T22:20:00Z", "end": "2026-11-16T23:20:00Z"},
        {"id": "T08", "period": "test", "kind": "no_reports", "cause": "communications",
         "group": "bra3-eb", "detector_ids": ["bra3-eb-lt", "bra3-eb-t1"],
         "start": "2026-11-17T16:15:00Z", "end": "2026-11-17T17:15:00Z"},
    ],
}


def _alert(i: int, **fields) -> dict:
    base = {"id": i, "detector_id": None, "group": None, "detectors": None, "cause": "traffic",
            "summary": "a group alert",
            "withdrawn": False}
    return {**base, **fields}


def test_a_group_traffic_alert_detects_the_shift_its_members_show() -> None:
    """A group alert naming the injection's detectors matches it (cause included); a group
    outage alert matches an outage of its group."""
    alerts = [
        _alert(1, group="orx-eb", kind="low_volume", detectors=["orx-eb-s2", "orx-eb-s3",
                                                              "orx-eb-s4"],
               start="2026-11-16T22:20:00Z", end="2026-11-16T23:00:00Z"),
        _alert(2, group="bra3-eb", kind="no_reports", cause="communications",
               detectors=["bra3-eb-lt", "bra3-eb-t1"],
               start="2026-11-17T16:25:00Z", end="2026-11-17T17:10:00Z"),
    ]
    report = evaluate(TRUTH, alerts, intervals={"orx-eb-s2": 300, "orx-eb-s3": 300,
                                                "bra3-eb-lt": 300, "bra3-eb-t1": 300})
    assert report["recall"] == 1.0, report


def test_a_group_alert_of_other_detectors_does_not_count() -> None:
    """A traffic alert on a different group's detectors leaves the injection missed."""
    alerts = [_alert(1, group="orx-wb", kind="low_volume", detectors=["orx-wb-s2"],
                     start="2026-11-16T22:20:00Z", end="2026-11-16T23:00:00Z")]
    report = evaluate(TRUTH, alerts, intervals={"orx-wb-s2": 300})
    assert report["recall"] == 0.0, report
