"""Pictures people would rather look at than read: a detector's day against its baseline band."""

from __future__ import annotations

from datetime import datetime
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.dates as mdates  # noqa: E402
import matplotlib.pyplot as plt  # noqa: E402


def plot_day(baseline_doc: dict[str, Any], counts: list[dict[str, Any]],
             alerts: list[dict[str, Any]], *, title: str, out: str | Path) -> Path:
    """Observed counts over the expected count and its predictive band, alerts shaded.

    ``baseline_doc`` is the body of ``GET /v1/detectors/{id}/baseline?date=...``; ``counts``
    the body's ``data`` of ``GET /v1/counts``; ``alerts`` alert objects of the API."""
    rows = baseline_doc["data"]
    times = [datetime.fromisoformat(r["start"]) for r in rows]
    tz = times[0].tzinfo
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
                label="observed")
    for i, a in enumerate(alerts):
        lo = datetime.fromisoformat(a["start"].replace("Z", "+00:00")).astimezone(tz)
        hi = datetime.fromisoformat(a["end"].replace("Z", "+00:00")).astimezone(tz)
        ax.axvspan(max(lo, times[0]), min(hi, times[-1]), color="#fdae6b", alpha=0.25,
                   label="alert" if i == 0 else None)
        ax.text(max(lo, times[0]), ax.get_ylim()[1] * 0.97, f" {a['kind']} ({a['cause']})",
                fontsize=7, va="top", color="#7f2704")
    model = baseline_doc["model"]
    ax.set_title(f"{title}\n{baseline_doc['day_type']} profile ({model['distribution']}, "
                 f"{model['days_used']} days), baseline #{model['baseline_id']}", fontsize=10)
    ax.set_ylabel(f"vehicles per {baseline_doc['interval_s'] // 60} min")
    ax.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M", tz=tz))
    ax.set_xlim(times[0], times[-1])
    ax.set_ylim(bottom=0)
    ax.grid(alpha=0.3)
    ax.legend(loc="upper left", fontsize=8)
    fig.tight_layout()
    path = Path(out)
    fig.savefig(path)
    plt.close(fig)
    return path
