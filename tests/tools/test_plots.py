"""The day plot draws only the day's own alerts, names local time and keeps zeros visible."""

from __future__ import annotations

from datetime import datetime, timedelta, timezone

from service.tools.plots import day_alerts, plot_day

DAY = datetime(2026, 11, 17, tzinfo=timezone(timedelta(hours=-6)))


def _alert(start: datetime, end: datetime, **extra) -> dict:
    return {"start": start.isoformat(), "end": end.isoformat(), "kind": "zero_counts",
            "cause": "detector", "withdrawn": False, **extra}


def test_only_alerts_overlapping_the_day_are_drawn() -> None:
    """Alerts of other days and withdrawn ones are left out; one reaching in from the day
    before is kept."""
    end = DAY + timedelta(days=1)
    inside = _alert(DAY + timedelta(hours=8), DAY + timedelta(hours=9))
    reaching_in = _alert(DAY - timedelta(hours=3), DAY + timedelta(hours=1))
    yesterday = _alert(DAY - timedelta(hours=5), DAY - timedelta(hours=1))
    tomorrow = _alert(end + timedelta(hours=2), end + timedelta(hours=3))
    withdrawn = _alert(DAY + timedelta(hours=2), DAY + timedelta(hours=3), withdrawn=True)
    kept = day_alerts([inside, reaching_in, yesterday, tomorrow, withdrawn], DAY, end)
    assert kept == [inside, reaching_in]


def test_plot_writes_a_png_with_zero_counts_and_an_alert(tmp_path) -> None:
    """A day with zeros and an alert renders to a PNG file."""
    rows = [{"start": (DAY + timedelta(minutes=15 * i)).isoformat(), "expected": 20.0,
             "low": 12.0, "high": 29.0} for i in range(96)]
    doc = {"data": rows, "interval_s": 900, "level": 0.95, "day_type": "weekday",
           "model": {"distribution": "negative binomial", "days_used": 40, "baseline_id": 3}}
    counts = [{"start": r["start"], "count": 0 if 30 <= i < 40 else 21}
              for i, r in enumerate(rows)]
    alert = _alert(DAY + timedelta(hours=7, minutes=30), DAY + timedelta(hours=9, minutes=45))
    out = plot_day(doc, counts, [alert], title="Elm St NB (elm-nb), 2026-11-17",
                   out=tmp_path / "day.png", timezone="America/Chicago")
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and out.stat().st_size > 10_000
