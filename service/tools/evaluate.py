"""Score the alerts a running Tallyward raised against a feed's injected ground truth.

Reads alerts only through the public API (``GET /v1/alerts``), so it judges what an
operator's dashboard would see. An injection counts as detected when a non-withdrawn alert of
a matching kind lies on one of its detectors (or, for communications loss, on its group)
and overlaps the injection window (with one hour of slack after it ends).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import orjson

from service.timefmt import parse_rfc3339

MATCHING_KINDS = {
    "zero_counts": {"zero_counts", "low_volume"},
    "low_volume": {"low_volume", "zero_counts"},
    "high_volume": {"high_volume", "over_capacity"},
    "over_capacity": {"over_capacity", "high_volume"},
    "repeated_value": {"repeated_value"},
    "no_reports": {"no_reports"},
}
SLACK_S = 3600
DAY_S = 86_400


def fetch_alerts(url: str, key: str | None, *, page: int = 1000) -> list[dict[str, Any]]:
    """Every alert's latest state, by polling ``/v1/alerts`` from seq 0."""
    headers = {"Authorization": f"Bearer {key}"} if key else {}
    latest: dict[int, dict[str, Any]] = {}
    after = 0
    with httpx.Client(base_url=url.rstrip("/"), headers=headers, timeout=60) as c:
        while True:
            r = c.get("/v1/alerts", params={"after": after, "limit": page, "status": "any"})
            r.raise_for_status()
            body = r.json()
            for alert in body["data"]:
                latest[alert["id"]] = alert
            if not body["data"] or body["next_after"] == after:
                break
            after = body["next_after"]
            if len(body["data"]) < page:
                break
    return [a for a in latest.values() if not a["withdrawn"]]


@dataclass
class Match:
    injection: dict[str, Any]
    alert: dict[str, Any] | None
    delay_s: float | None


def _span(alert: dict[str, Any]) -> tuple[int, int]:
    return parse_rfc3339(alert["start"]), parse_rfc3339(alert["end"])


def _touches(alert: dict[str, Any], inj: dict[str, Any]) -> bool:
    """The alert is about the injection's detectors: its own detector, or for a group alert
    (an outage, or a traffic shift most of the group shows) its group or member detectors."""
    if alert["detector_id"] is None:
        if inj["kind"] == "no_reports" and alert["group"] == inj["group"]:
            return True
        return bool(set(alert.get("detectors") or ()) & set(inj["detector_ids"]))
    return alert["detector_id"] in inj["detector_ids"]


def evaluate(truth: dict[str, Any], alerts: Iterable[dict[str, Any]], *,
             intervals: dict[str, int] | None = None) -> dict[str, Any]:
    """Per injection: detected, delay, cause; overall recall, delays, false alerts."""
    alerts = list(alerts)
    test_lo = parse_rfc3339(truth["test"]["start"])
    test_hi = parse_rfc3339(truth["test"]["end"])
    injections = [i for i in truth["injections"] if i.get("period", "test") == "test"]
    matches: list[Match] = []
    used: set[int] = set()
    for inj in injections:
        lo, hi = parse_rfc3339(inj["start"]), parse_rfc3339(inj["end"])
        best: tuple[float, dict[str, Any]] | None = None
        for a in alerts:
            if a["kind"] not in MATCHING_KINDS[inj["kind"]] or not _touches(a, inj):
                continue
            a_lo, a_hi = _span(a)
            if a_hi <= lo or a_lo >= hi + SLACK_S:
                continue
            ids = [a["detector_id"]] if a["detector_id"] else list(a.get("detectors") or ())
            step = min(((intervals or {}).get(d, 0) for d in ids), default=0)
            raised = a_lo + step  # the end of the first anomalous interval
            if best is None or raised < best[0]:
                best = (raised, a)
        for a in alerts:  # every alert overlapping an injection on its detectors is explained
            if _touches(a, inj) or (a["group"] == inj["group"] and inj["cause"] != "detector"):
                a_lo, a_hi = _span(a)
                if a_hi > lo - SLACK_S and a_lo < hi + SLACK_S:
                    used.add(a["id"])
        matches.append(Match(inj, best[1] if best else None,
                             max(0.0, best[0] - lo) if best else None))
    injected_days = set()
    for inj in injections:
        lo, hi = parse_rfc3339(inj["start"]), parse_rfc3339(inj["end"])
        members = inj["detector_ids"]
        for day in range((lo - test_lo) // DAY_S, (hi - 1 - test_lo) // DAY_S + 1):
            for det in members:
                injected_days.add((det, day))
    detectors = sorted({d for d in (intervals or {})} | {a["detector_id"] for a in alerts
                                                          if a["detector_id"]})
    n_days = (test_hi - test_lo) // DAY_S
    clean_days = len(detectors) * n_days - len(injected_days)
    false_alerts = []
    for a in alerts:
        a_lo, _ = _span(a)
        if a["id"] in used or not (test_lo <= a_lo < test_hi):
            continue
        day = (a_lo - test_lo) // DAY_S
        if a["detector_id"] is not None and (a["detector_id"], day) in injected_days:
            continue
        false_alerts.append(a)
    detected = [m for m in matches if m.alert is not None]
    delays = np.array([m.delay_s for m in detected], float)
    by_kind: dict[str, list[int]] = {}
    for m in matches:
        hit = by_kind.setdefault(m.injection["kind"], [0, 0])
        hit[0] += m.alert is not None
        hit[1] += 1
    cause_ok = [m for m in detected if m.alert["cause"] == m.injection["cause"]]  # type: ignore[index]
    return {
        "injections": [{
            "id": m.injection["id"], "kind": m.injection["kind"], "cause": m.injection["cause"],
            "detectors": m.injection["detector_ids"], "start": m.injection["start"],
            "detected": m.alert is not None,
            "alert_id": m.alert["id"] if m.alert else None,
            "alert_kind": m.alert["kind"] if m.alert else None,
            "alert_cause": m.alert["cause"] if m.alert else None,
            "delay_min": round(m.delay_s / 60, 1) if m.delay_s is not None else None,
        } for m in matches],
        "recall": len(detected) / len(matches) if matches else None,
        "recall_by_kind": {k: f"{v[0]}/{v[1]}" for k, v in sorted(by_kind.items())},
        "delay_median_min": round(float(np.median(delays)) / 60, 1) if delays.size else None,
        "delay_p90_min": round(float(np.percentile(delays, 90)) / 60, 1) if delays.size else None,
        "cause_accuracy": len(cause_ok) / len(detected) if detected else None,
        "false_alerts": len(false_alerts),
        "fault_free_detector_days": clean_days,
        "false_alerts_per_detector_day": len(false_alerts) / clean_days if clean_days else None,
        "false_alert_examples": [{"id": a["id"], "detector_id": a["detector_id"], "kind": a["kind"],
                                  "start": a["start"], "summary": a["summary"]}
                                 for a in false_alerts[:10]],
    }


def detector_intervals(url: str, key: str | None) -> dict[str, int]:
    headers = {"Authorization": f"Bearer {key}"} if key else {}
    with httpx.Client(base_url=url.rstrip("/"), headers=headers, timeout=60) as c:
        r = c.get("/v1/detectors", params={"limit": 10000})
        r.raise_for_status()
        return {d["detector_id"]: d["interval_s"] for d in r.json()["data"]}


def load_truth(path: str | Path) -> dict[str, Any]:
    return orjson.loads(Path(path).read_bytes())


def print_report(report: dict[str, Any], *, out=None) -> None:  # type: ignore[no-untyped-def]
    from service.textio import table

    rows = [[i["id"], i["kind"], ",".join(i["detectors"])[:34], _short(i["start"]),
             "yes" if i["detected"] else "MISSED", i["alert_kind"] or "", i["delay_min"],
             f"{i['alert_cause'] or ''}{'' if not i['detected'] else (' ok' if i['alert_cause'] == i['cause'] else ' (truth ' + i['cause'] + ')')}"]
            for i in report["injections"]]
    table(rows, ["truth", "kind", "detectors", "start", "detected", "alert kind", "delay min",
                 "cause"], out=out)
    print(file=out)
    recall = report["recall"]
    fa = report["false_alerts_per_detector_day"]
    table([[f"{recall:.0%}" if recall is not None else "-",
            " ".join(f"{k}={v}" for k, v in report["recall_by_kind"].items()),
            report["delay_median_min"], report["delay_p90_min"],
            f"{report['cause_accuracy']:.0%}" if report["cause_accuracy"] is not None else "-",
            f"{report['false_alerts']} / {report['fault_free_detector_days']} = "
            f"{fa:.3f}" if fa is not None else "-"]],
          ["recall", "by kind", "median delay min", "p90 delay min", "cause accuracy",
           "false alerts per fault-free detector-day"], out=out)


def _short(ts: str) -> str:
    return datetime.fromisoformat(ts).strftime("%a %d %b %H:%M")
