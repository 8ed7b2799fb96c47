"""Inline SVG drawn by the server: the network map and a detector's day.

Nothing is fetched: the map is the detectors' own coordinates projected onto the network's
extent (no tiles), and the day chart is plain SVG with a title on every mark.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from service.store.overview import NetworkRow
from service.web.ui.render import h

MAP_W, MAP_H, MAP_PAD = 900, 520, 24  # SVG user units
# Marker shapes by state: the state never rests on color alone (the color is the Okabe & Ito
# (2008) color-blind-safe set, and each state has its own shape and its name in the table).
SHAPES = {"reporting": "circle", "alerting": "triangle", "silent": "square",
          "learning": "diamond"}


def shape(state: str, x: float, y: float, r: float = 5.5) -> str:
    """One marker of ``state`` centered on (x, y)."""
    kind = SHAPES[state]
    cls = f'class="mk st-{state}"'
    if kind == "circle":
        return f'<circle {cls} cx="{x:.1f}" cy="{y:.1f}" r="{r * 0.9:.1f}"/>'
    if kind == "square":
        return f'<rect {cls} x="{x - r * 0.85:.1f}" y="{y - r * 0.85:.1f}" width="{r * 1.7:.1f}" height="{r * 1.7:.1f}"/>'
    if kind == "triangle":
        return (f'<path {cls} d="M{x:.1f},{y - r * 1.15:.1f}L{x + r:.1f},{y + r * 0.75:.1f}'
                f'L{x - r:.1f},{y + r * 0.75:.1f}Z"/>')
    return (f'<path {cls} d="M{x:.1f},{y - r * 1.1:.1f}L{x + r:.1f},{y:.1f}L{x:.1f},'
            f'{y + r * 1.1:.1f}L{x - r:.1f},{y:.1f}Z"/>')


@functools.cache  # one per state: the network table draws one per detector
def legend_icon(state: str) -> str:
    return (f'<svg class="icon" width="14" height="14" viewBox="0 0 14 14" aria-hidden="true" '
            f'focusable="false">{shape(state, 7, 7.5, 5)}</svg>')


def network_map(rows: Sequence[NetworkRow]) -> tuple[str, int]:
    """(the SVG map of the detectors that have a location, how many markers it holds)."""
    placed = [r for r in rows if r.lon is not None and r.lat is not None]
    if not placed:
        return '<p class="muted">No detector has a location to draw.</p>', 0
    lats = [r.lat for r in placed]
    lons = [r.lon for r in placed]
    # Equirectangular projection at the network's middle latitude: at a city's or a region's
    # extent it keeps shapes true enough to find a detector.
    squeeze = math.cos(math.radians((min(lats) + max(lats)) / 2))  # type: ignore[type-var]
    x0, x1 = min(lons) * squeeze, max(lons) * squeeze  # type: ignore[type-var, operator]
    y0, y1 = min(lats), max(lats)  # type: ignore[type-var]
    span = max(x1 - x0, (y1 - y0) * (MAP_W - 2 * MAP_PAD) / (MAP_H - 2 * MAP_PAD), 1e-6)
    scale = (MAP_W - 2 * MAP_PAD) / span
    ox = MAP_PAD + ((MAP_W - 2 * MAP_PAD) - (x1 - x0) * scale) / 2
    oy = MAP_PAD + ((MAP_H - 2 * MAP_PAD) - (y1 - y0) * scale) / 2

    def xy(r: NetworkRow) -> tuple[float, float]:
        return (ox + (r.lon * squeeze - x0) * scale,  # type: ignore[operator]
                oy + (y1 - r.lat) * scale)  # type: ignore[operator]

    groups: dict[str, list[tuple[float, float]]] = {}
    for r in placed:
        if r.group:
            groups.setdefault(r.group, []).append(xy(r))
    parts = [f'<svg class="map" viewBox="0 0 {MAP_W} {MAP_H}" role="group" '
             f'aria-labelledby="map-title"><title id="map-title">Map of {len(placed)} detectors '
             'at their coordinates, marked by state</title>'
             f'<rect class="map-bg" x="0" y="0" width="{MAP_W}" height="{MAP_H}"/>']
    label_groups = len(groups) <= 40
    for name, points in groups.items():
        if len(points) > 1:
            path = " ".join(f"{x:.1f},{y:.1f}" for x, y in points)
            parts.append(f'<polyline class="grp" points="{path}"/>')
        if label_groups:
            gx = sum(p[0] for p in points) / len(points)
            gy = min(p[1] for p in points) - 10
            parts.append(f'<text class="grp-label" x="{gx:.1f}" y="{max(gy, 10):.1f}">{h(name)}</text>')
    order = {"reporting": 0, "learning": 1, "alerting": 2, "silent": 3}
    for r in sorted(placed, key=lambda r: order[r.state]):
        x, y = xy(r)
        name = f"{r.detector_id} ({r.label or 'no label'}): {r.state}"
        parts.append(f'<a href="/ui/detectors/{h(r.detector_id)}" tabindex="-1" '
                     f'aria-label="{h(name)}" data-detector="{h(r.detector_id)}" '
                     f'data-state="{r.state}"><title>{h(name)}</title>{shape(r.state, x, y)}</a>')
    parts.append("</svg>")
    return "".join(parts), len(placed)


# ---------------------------------------------------------------------------- a detector's day

CH_W, CH_H = 960, 320
LEFT, RIGHT, TOP, BOTTOM = 48, 12, 22, 30


@dataclass(frozen=True)
class DayPoint:
    start_s: int
    label: str  # local HH:MM
    expected: float | None
    low: int | None
    high: int | None
    observed: int | None


def _nice_top(value: float) -> float:
    if value <= 5:
        return 5.0
    power = 10 ** math.floor(math.log10(value))
    for step in (1, 2, 2.5, 5, 10):
        if value <= step * power:
            return step * power
    return 10 * power


def day_chart(points: Sequence[DayPoint], *, lo_s: int, hi_s: int, interval_s: int,
              alerts: Sequence[dict[str, Any]], hour_labels: Sequence[tuple[int, str]]) -> str:
    """Observed counts (points) against the expected count (line) and its 95 % band (area),
    with the detector's alerts shaded, over the local day ``[lo_s, hi_s)``."""
    top_value = max([p.high or 0 for p in points] + [p.observed or 0 for p in points] + [1])
    top = _nice_top(top_value * 1.05)
    plot_w, plot_h = CH_W - LEFT - RIGHT, CH_H - TOP - BOTTOM

    def x(t: float) -> float:
        return LEFT + (t - lo_s) / (hi_s - lo_s) * plot_w

    def y(v: float) -> float:
        return TOP + plot_h - v / top * plot_h

    parts = [f'<svg class="day" viewBox="0 0 {CH_W} {CH_H}" role="group" '
             'aria-labelledby="day-title"><title id="day-title">Observed counts against the '
             'expected count and its 95 % band</title>']
    for k in range(5):  # y grid
        v = top * k / 4
        parts.append(f'<line class="gridline" x1="{LEFT}" x2="{CH_W - RIGHT}" y1="{y(v):.1f}" '
                     f'y2="{y(v):.1f}"/><text class="tick" x="{LEFT - 6}" y="{y(v) + 4:.1f}" '
                     f'text-anchor="end">{v:g}</text>')
    for t, text in hour_labels:
        parts.append(f'<line class="gridline" x1="{x(t):.1f}" x2="{x(t):.1f}" y1="{TOP}" '
                     f'y2="{TOP + plot_h}"/><text class="tick" x="{x(t):.1f}" '
                     f'y="{CH_H - 10}" text-anchor="middle">{h(text)}</text>')
    for a in alerts:  # shading first: under the band and the points
        a0, a1 = max(a["start_s"], lo_s), min(a["end_s"], hi_s)
        if a1 <= a0:
            continue
        label = f'{a["kind"]} · {a["cause"]}'
        parts.append(f'<g class="shade" data-alert="{a["id"]}"><title>Alert {a["id"]}: '
                     f'{h(label)}</title><rect class="shade-{h(a["kind"])}" x="{x(a0):.1f}" '
                     f'y="{TOP}" width="{max(x(a1) - x(a0), 2):.1f}" height="{plot_h}"/>'
                     f'<text class="shade-label" x="{x(a0) + 3:.1f}" y="{TOP - 6}">'
                     f'{h(label)}</text></g>')
    mid = interval_s / 2
    band = [p for p in points if p.low is not None and p.high is not None]
    if band:
        upper = " ".join(f"{x(p.start_s + mid):.1f},{y(p.high):.1f}" for p in band)  # type: ignore[arg-type]
        lower = " ".join(f"{x(p.start_s + mid):.1f},{y(p.low):.1f}" for p in reversed(band))  # type: ignore[arg-type]
        parts.append(f'<polygon class="band" points="{upper} {lower}"><title>95 % band of the '
                     'expected count</title></polygon>')
        line = " ".join(f"{x(p.start_s + mid):.1f},{y(p.expected):.1f}" for p in band)  # type: ignore[arg-type]
        parts.append(f'<polyline class="expected" points="{line}"/>')
    for p in points:
        if p.observed is None:
            continue
        outside = p.low is not None and p.high is not None and not p.low <= p.observed <= p.high
        words = f"{p.label}: observed {p.observed}"
        if p.expected is not None:
            words += f", expected {p.expected:.1f} (95 % band {p.low}–{p.high})"
        if outside:
            words += ", outside the band"
        px, py = x(p.start_s + mid), y(p.observed)
        mark = (f'<rect class="obs out" x="{px - 3:.1f}" y="{py - 3:.1f}" width="6" height="6"/>'
                if outside else f'<circle class="obs" cx="{px:.1f}" cy="{py:.1f}" r="2.6"/>')
        parts.append(f'<g class="pt" tabindex="0" role="img" aria-label="{h(words)}" '
                     f'data-value="{h(words)}"><title>{h(words)}</title>{mark}</g>')
    parts.append("</svg>")
    return "".join(parts)
