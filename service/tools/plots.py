"""Pictures people would rather look at than read: a detector's day against its baseline band."""

from __future__ import annotations

from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.dates as mdates  # noqa: E402
import matplotlib.pyplot as plt  # noqa: E402


def _instant(text: str) -> datetime:
    return datetime.fromisoformat(text.replace("Z", "+00:00"))


def day_alerts(alerts: list[dict[str, Any]], day_start: datetime, day_end: datetime
               ) -> list[dict[str, Any]]:
    """The alerts that overlap [day_start, day_end), withdrawn ones left out."""
    return [a for a in alerts if not a.get("withdrawn")
            and _instant(a["start"]) < day_end and _instant(a["end"]) >= day_start]


def plot_day(baseline_doc: dict[str, Any], counts: list[dict[str, Any]],
             alerts: list[dict[str, Any]], *, title: str, out: str | Path,
             timezone: str | None = None) -> Path:
    """Observed counts over the expected count and its predictive band, the day's alerts shaded.

    ``baseline_doc`` is the body of ``GET /v1/detectors/{id}/baseline?date=...``; ``counts``
    the body's ``data`` of ``GET /v1/counts``; ``alerts`` alert objects of the API (only those
    overlapping the day are drawn); ``title`` should carry the detector's label; ``timezone``
    (the detector's IANA zone) names the x-axis's local time."""
    rows = baseline_doc["data"]
    times = [datetime.fromisoformat(r["start"]) for r in rows]
    tz = times[0].tzinfo
    step = timedelta(seconds=int(baseline_doc["interval_s"]))
    alerts = day_alerts(alerts, times[0], times[-1] + step)
    expected = [r["expected"] for r in rows]
    low = [r["low"] for r in rows]
    high = [r["high"] for r in rows]
    fig, ax = plt.subplots(figsize=(11, 4.2), dpi=110)
    ax.fill_between(times, low, high, step="mid", color="#9ecae1", alpha=0.55,
                    label=f"{baseline_doc['level']:.0%} predictive interval")
    ax.plot(times, expected, color="#08519c", lw=1.4, label="expected")
    if counts:
        ct = [datetime.fromisoformat(c["start"].replace("Z", "+00:00")).astimezone(tz)
              for c in counts]
        ax.plot(ct, [c["count"] for c in counts], ".", ms=3.5, color="#d94801",
                label="observed", clip_on=False, zorder=3)  # zeros stay visible on the axis
    for i, a in enumerate(alerts):
        lo = _instant(a["start"]).astimezone(tz)
        hi = (_instant(a["end"]) + step).astimezone(tz)
        ax.axvspan(max(lo, times[0]), min(hi, times[-1]), color="#fdae6b", alpha=0.25,
                   label="alert" if i == 0 else None)
        ax.text(max(lo, times[0]), ax.get_ylim()[1] * 0.97, f" {a['kind']} ({a['cause']})",
                fontsize=7, va="top", color="#7f2704")
    model = baseline_doc["model"]
    ax.set_title(f"{title}\n{baseline_doc['day_type']} profile ({model['distribution']}, "
                 f"{model['days_used']} days), baseline #{model['baseline_id']}", fontsize=10)
    ax.set_ylabel(f"vehicles per {baseline_doc['interval_s'] // 60} min")
    ax.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M", tz=tz))
    offset = times[0].strftime("UTC%z")
    ax.set_xlabel(f"local time, {timezone} ({offset})" if timezone else f"local time ({offset})")
    ax.set_xlim(times[0], times[-1])
    top = ax.get_ylim()[1]
    ax.set_ylim(bottom=-0.03 * top, top=top)  # a count of 0 sits just above the lower edge
    ax.grid(alpha=0.3)
    ax.legend(loc="upper left", fontsize=8)
    fig.tight_layout()
    path = Path(out)
    fig.savefig(path)
    plt.close(fig)
    return path
