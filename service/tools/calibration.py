"""Calibration of the false-alert budget through the real pipeline, on traffic the model does not
assume.

A measurement, not a self-consistency check: the counts come from a generator whose law lies
outside the baseline's model class, the parameters are estimated from the history at hand, and
everything runs through the product's own path (a SQLite or PostgreSQL database, ingest,
``fit.fit_many`` on the history, ``score.score_until_idle`` on the data clock). Every alert
raised on the scored weeks is false, as no fault is injected.

The traffic, per detector (no groups; detectors are independent)::

    count ~ Poisson(expected_rate * D[local day] * exp(X[hour] - sd^2 / 2))

``expected_rate`` is the demo simulator's profile (``simulate.expected_rate``: day type, time of
day, seasonal trend); ``D`` a gamma day factor with mean 1; ``X`` a stationary Gaussian AR(1)
over clock hours with standard deviation ``sd`` and lag-one correlation ``phi`` (hour-to-hour
correlated lognormal swings: weather, small events, the ordinary drift of demand within a day,
which the baseline does not model). A share ``missing`` of intervals is missing at random
(independently, so two in a row happen).

Five volume classes span a freeway lane group down to a local road whose peak 5-minute count is
about 2 vehicles (``CLASSES``).
"""

from __future__ import annotations

import math
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
from scipy import stats
from sqlalchemy import Engine, select

from service.config import Settings
from service.pipeline import baseline_day, fit, ingest, score
from service.store import detectors as registry
from service.store import scoring as store_scoring
from service.store import tables
from service.tools import simulate

INTERVAL_S = 300
DAY_S = 86_400
WEEK_S = 7 * DAY_S
SCORED_START = date(2026, 6, 1)  # a Monday; history runs back from it


@dataclass(frozen=True)
class VolumeClass:
    """One class of detectors: daily volume on a Tuesday, road class, lanes, profile, and the
    gamma shape of its day factor (variance 1/shape)."""

    name: str
    daily_volume: float
    road_class: str
    lanes: int
    profile: str
    day_shape: float


# Peak 5-minute counts on a weekday about 150, 45, 15, 5 and 2 vehicles. Day-to-day variation
# grows as roads get smaller (CV 9 %, 13 %, 13 %, 20 %, 20 %; common practice, not a source).
CLASSES = (
    VolumeClass("freeway", 20_000, "freeway", 3, "freeway_inbound", 120.0),
    VolumeClass("arterial", 6_000, "arterial", 2, "arterial", 60.0),
    VolumeClass("collector", 2_000, "arterial", 1, "arterial", 60.0),
    VolumeClass("local", 600, "local", 1, "local", 25.0),
    VolumeClass("quiet", 250, "local", 1, "local", 25.0),
)


@dataclass(frozen=True)
class Traffic:
    """Settings of the normal traffic (see the module docstring)."""

    swing_sd: float = 0.10
    swing_phi: float = 0.6
    missing: float = 0.01


@dataclass
class Simulated:
    """Generated counts: one row per present interval, in time order."""

    specs: list[simulate.DetectorSpec]
    classes: dict[str, str]  # detector -> class name
    detector: np.ndarray  # index into specs
    start_s: np.ndarray
    count: np.ndarray
    history_start_s: int
    scored_start_s: int
    end_s: int


def _local_midnight(day: date) -> int:
    return int(datetime(day.year, day.month, day.day, tzinfo=ZoneInfo(simulate.TIMEZONE))
               .timestamp())


def generate(*, per_class: int, history_weeks: int, scored_weeks: int, traffic: Traffic,
             seed: int, classes: Sequence[VolumeClass] = CLASSES) -> Simulated:
    """Normal traffic for ``per_class`` detectors of each class (see the module docstring)."""
    history_start = SCORED_START - timedelta(weeks=history_weeks)
    end = SCORED_START + timedelta(weeks=scored_weeks)
    lo, mid, hi = (_local_midnight(d) for d in (history_start, SCORED_START, end))
    root = np.random.SeedSequence(seed)
    specs, cls_of, parts = [], {}, []
    starts = np.arange(lo, hi, INTERVAL_S, dtype=np.int64)
    local_day = (starts + simulate.utc_offsets_s(starts, simulate.TIMEZONE)) // DAY_S
    day_idx = local_day - local_day[0]
    hour_idx = (starts - lo) // 3600
    n_hours = int(hour_idx[-1]) + 1
    children = iter(root.spawn(len(classes) * per_class))
    for vc in classes:
        for k in range(per_class):
            det = f"cal-{vc.name}-{k + 1:02d}"
            spec = simulate.DetectorSpec(
                detector_id=det, label=f"Calibration {vc.name} detector {k + 1}", group=None,
                road_class=vc.road_class,
                facility="mainline" if vc.road_class == "freeway" else "road", lanes=vc.lanes,
                interval_s=INTERVAL_S, lon=-100.5 + 0.001 * len(specs), lat=36.2,
                base_daily_volume=vc.daily_volume, profile=vc.profile)
            specs.append(spec)
            cls_of[det] = vc.name
            rng = np.random.default_rng(next(children))
            day = rng.gamma(vc.day_shape, 1.0 / vc.day_shape, size=int(day_idx[-1]) + 1)
            sd, phi = traffic.swing_sd, traffic.swing_phi
            x = np.empty(n_hours)
            x[0] = rng.normal(0.0, sd)
            shocks = rng.normal(0.0, sd * math.sqrt(1.0 - phi * phi), size=n_hours)
            for h in range(1, n_hours):
                x[h] = phi * x[h - 1] + shocks[h]
            swing = np.exp(x - 0.5 * sd * sd)
            rate = simulate.expected_rate(spec, starts) * day[day_idx] * swing[hour_idx]
            counts = rng.poisson(rate)
            present = rng.random(starts.size) >= traffic.missing
            parts.append((len(specs) - 1, starts[present], counts[present]))
    detector = np.concatenate([np.full(p[1].size, p[0]) for p in parts])
    start_s = np.concatenate([p[1] for p in parts])
    count = np.concatenate([p[2] for p in parts])
    order = np.lexsort((detector, start_s))
    return Simulated(specs, cls_of, detector[order], start_s[order], count[order], lo, mid, hi)


def _register(engine: Engine, sim: Simulated) -> None:
    net = simulate.Network(detectors=sim.specs, detector_index=np.zeros(0, np.int32),
                           start_s=np.zeros(0, np.int64), count=np.zeros(0, np.int64),
                           injections=[], history_start_s=sim.history_start_s,
                           test_start_s=sim.scored_start_s, end_s=sim.end_s)
    out = registry.import_feature_collection(engine, simulate.detectors_geojson(net))
    if out.get("errors"):
        raise RuntimeError(f"detectors not registered: {out['errors']}")


def _ingest(engine: Engine, sim: Simulated, mask: np.ndarray, *, dirty: bool) -> None:
    ids = [s.detector_id for s in sim.specs]
    fmt = {}
    rows = []
    for d, t, c in zip(sim.detector[mask], sim.start_s[mask], sim.count[mask], strict=True):
        text = fmt.get(t)
        if text is None:
            text = fmt[t] = datetime.fromtimestamp(int(t), UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
        rows.append((ids[d], text, int(c)))
    step = 20_000
    for lo in range(0, len(rows), step):
        items = [(i, *r) for i, r in enumerate(rows[lo:lo + step])]
        result = ingest.ingest_items(engine, items, future_tolerance_s=10**9,
                                     after_store=store_scoring.mark_dirty if dirty else None)
        if result.rejected:
            raise RuntimeError(f"counts rejected: {result.rejected[:3]}")


@dataclass
class ClassFigures:
    """False alerts and band coverage of one volume class (or of all of them)."""

    name: str
    detectors: int
    detector_weeks: float
    alerts: int
    kinds: dict[str, int] = field(default_factory=dict)
    covered: int = 0
    judged: int = 0
    hours: list[float] = field(default_factory=list)  # alert lengths

    @property
    def rate(self) -> float:
        """False alerts per detector-week."""
        return self.alerts / self.detector_weeks

    @property
    def coverage(self) -> float:
        return self.covered / self.judged if self.judged else float("nan")

    def lower_rate(self, confidence: float) -> float:
        """One-sided lower confidence bound on the alert rate (exact Poisson, Garwood 1936)."""
        if self.alerts == 0:
            return 0.0
        return float(stats.chi2.ppf(1.0 - confidence, 2 * self.alerts) / 2.0
                     / self.detector_weeks)


@dataclass
class Calibration:
    """One run: figures per class and overall, timings, the settings used."""

    history_weeks: int
    scored_weeks: int
    traffic: Traffic
    budget: float
    per_class: list[ClassFigures]
    overall: ClassFigures
    seconds: dict[str, float]
    alerts: list[Any]


def run(database_url: str, *, per_class: int = 8, history_weeks: int = 8, scored_weeks: int = 4,
        traffic: Traffic | None = None, seed: int = 20260601, budget: float = 0.05,
        workers: int = 1, settings_overrides: dict[str, Any] | None = None) -> Calibration:
    """Generate normal traffic, store the history, fit, store and score the scored weeks, and
    measure false alerts and the served 95 % band's coverage of the scored counts.

    ``database_url`` must point at an empty, migrated database."""
    traffic = traffic or Traffic()
    settings = Settings(database_url=database_url, clock="data", false_alerts_per_week=budget,
                        **(settings_overrides or {}))
    from service.store.engine import make_engine

    engine = make_engine(settings)
    seconds: dict[str, float] = {}
    try:
        t0 = time.perf_counter()
        sim = generate(per_class=per_class, history_weeks=history_weeks,
                       scored_weeks=scored_weeks, traffic=traffic, seed=seed)
        _register(engine, sim)
        history = sim.start_s < sim.scored_start_s
        _ingest(engine, sim, history, dirty=False)
        seconds["generate+ingest history"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        results = fit.fit_many(settings, engine, as_of_s=sim.scored_start_s, workers=workers)
        bad = [r for r in results if r["status"] != "fitted"]
        if bad:
            raise RuntimeError(f"fits failed: {bad[:3]}")
        seconds["fit"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        _ingest(engine, sim, ~history, dirty=True)
        seconds["ingest scored"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        score.score_until_idle(engine, settings)
        seconds["score"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        figures = _measure(engine, sim, budget=budget)
        seconds["measure"] = time.perf_counter() - t0
    finally:
        engine.dispose()
    per, overall, alerts = figures
    return Calibration(history_weeks, scored_weeks, traffic, budget, per, overall, seconds, alerts)


def _measure(engine: Engine, sim: Simulated, *, budget: float
             ) -> tuple[list[ClassFigures], ClassFigures, list[Any]]:
    a = tables.alerts
    with engine.connect() as conn:
        alerts = conn.execute(select(a.c.subject, a.c.detector_id, a.c.kind, a.c.cause,
                                     a.c.start_s, a.c.end_s, a.c.n_intervals).where(
            a.c.withdrawn == 0, a.c.part_of.is_(None), a.c.end_s >= sim.scored_start_s)).all()
    weeks = (sim.end_s - sim.scored_start_s) / WEEK_S
    names = list(dict.fromkeys(sim.classes.values()))
    per = {n: ClassFigures(n, 0, 0.0, 0) for n in names}
    for name in sim.classes.values():
        per[name].detectors += 1
        per[name].detector_weeks += weeks
    for r in alerts:
        name = sim.classes.get(r.detector_id or "", None)
        fig = per[name] if name is not None else None
        if fig is None:  # a group or network alert: counted once, on every class pro rata
            continue
        fig.alerts += 1
        fig.kinds[r.kind] = fig.kinds.get(r.kind, 0) + 1
        fig.hours.append((r.end_s - r.start_s + INTERVAL_S) / 3600.0)
    _coverage(engine, sim, per)
    overall = ClassFigures("all", sum(f.detectors for f in per.values()),
                           sum(f.detector_weeks for f in per.values()), len(alerts))
    for f in per.values():
        for k, v in f.kinds.items():
            overall.kinds[k] = overall.kinds.get(k, 0) + v
        overall.covered += f.covered
        overall.judged += f.judged
        overall.hours += f.hours
    return list(per.values()), overall, alerts


def _coverage(engine: Engine, sim: Simulated, per: dict[str, ClassFigures]) -> None:
    """Share of scored present counts inside the served 95 % band (GET .../baseline?date=)."""
    zone = ZoneInfo(simulate.TIMEZONE)
    days = []
    d = SCORED_START
    while _local_midnight(d) < sim.end_s:
        days.append(d)
        d += timedelta(days=1)
    scored = sim.start_s >= sim.scored_start_s
    for i, spec in enumerate(sim.specs):
        mine = scored & (sim.detector == i)
        t, c = sim.start_s[mine], sim.count[mine]
        lows, highs, grid = [], [], []
        for day in days:
            served = baseline_day.baseline_day(engine, spec.detector_id, day=day, day_type=None,
                                               level=0.95)
            lows.extend(p["low"] for p in served["data"])
            highs.extend(p["high"] for p in served["data"])
            grid.extend(int(datetime.fromisoformat(p["start"]).astimezone(zone).timestamp())
                        for p in served["data"])
        g = np.asarray(grid)
        pos = np.searchsorted(g, t)
        ok = (pos < g.size) & (g[np.minimum(pos, g.size - 1)] == t)
        lo_b, hi_b = np.asarray(lows)[pos[ok]], np.asarray(highs)[pos[ok]]
        inside = (c[ok] >= lo_b) & (c[ok] <= hi_b)
        fig = per[sim.classes[spec.detector_id]]
        fig.covered += int(inside.sum())
        fig.judged += int(ok.sum())


def table(cal: Calibration) -> str:
    """The calibration table as Markdown."""
    tr = cal.traffic
    lines = [
        f"history {cal.history_weeks} weeks, scored {cal.scored_weeks} weeks; swings sd "
        f"{tr.swing_sd:.2f}, lag-one correlation {tr.swing_phi:.2f}; {tr.missing:.0%} missing; "
        f"budget {cal.budget:g} per detector-week",
        "",
        "| class | detectors | false alerts | per detector-week | x budget | "
        "95% lower bound x budget | median h | 95% band coverage | kinds |",
        "|---|---|---|---|---|---|---|---|---|",
    ]
    for f in [*cal.per_class, cal.overall]:
        med = float(np.median(f.hours)) if f.hours else float("nan")
        kinds = ", ".join(f"{k} {v}" for k, v in sorted(f.kinds.items()))
        lines.append(
            f"| {f.name} | {f.detectors} | {f.alerts} | {f.rate:.3f} | {f.rate / cal.budget:.1f} "
            f"| {f.lower_rate(0.95) / cal.budget:.1f} | {med:.1f} | {f.coverage:.1%} "
            f"| {kinds} |")
    lines.append("")
    lines.append("seconds: " + ", ".join(f"{k} {v:.1f}" for k, v in cal.seconds.items()))
    return "\n".join(lines)
