"""Demo network generator: a fictional city's detectors, interval counts and injected faults.

The city of Marrowick is invented, and so are its roads and detector names. Its detectors are
placed in open farmland (about 36.2 N, 100.5 W, in the America/Chicago zone) and match no real
road network.

Counts are drawn from a non-homogeneous Poisson process. For detector ``d`` and the interval
starting at ``t`` (local wall-clock time, interval length ``interval_s`` seconds)::

    count ~ Poisson(expected_rate(d, t) * D[group(d), local day] * H[group(d), UTC hour])

    expected_rate = base_daily_volume * share(profile, day type, local hour at mid-interval)
                    * interval_s / 3600 * day_total_factor(day of week / day type)
                    * seasonal(local day of year)

``share`` integrates to 1 over 24 local hours, so a typical weekday carries
``base_daily_volume * seasonal`` vehicles. ``D`` (one per group and local day) and ``H`` (one
per group and UTC hour) are independent gamma factors with mean 1 and shapes ``day_shape`` and
``hour_shape`` (variance ``1/shape``); they make the counts negative binomial over a day, as
real counts are. Because both factors have mean 1, ``expected_rate`` is the true mean of every
count before faults and events are injected.

Injected faults and traffic events change only their own window: a rate scale ``f < 1`` thins
the fault-free counts binomially, ``f > 1`` adds independent Poisson(rate * (f - 1)) vehicles,
so the marginal law is exactly Poisson(f * rate) given the gamma factors. Missing reports are
absent rows, never zeros.

Regenerate the committed demo feed with::

    python -m service.tools.simulate --out seed_feed --seed 20261116
"""

from __future__ import annotations

import argparse
import csv
import gzip
import hashlib
import io
import json
import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np

from service.domain import KINDS, ROAD_CLASSES
from service.timefmt import parse_rfc3339, utc_offsets_s

SCENARIO = "marrowick-autumn-2026"
DEFAULT_SEED = 20261116
TIMEZONE = "America/Chicago"
HOLIDAY_CALENDAR = "US"
HISTORY_START = date(2026, 10, 5)
HISTORY_DAYS = 42
TEST_DAYS = 14
LONE_MISSING_FRACTION = 0.005

FACILITIES = ("mainline", "ramp", "approach", "road")
ACTIONS = ("zero", "scale", "scale_range", "freeze", "absent", "patchy")
ALERT_KINDS = KINDS
CAUSES = ("detector", "traffic", "communications")  # the causes an injection can have

#: Seasonal trend: ``1 + A cos(2 pi (day_of_year - peak) / 365.25)``; traffic peaks in July and
#: falls about 5 % across the eight weeks of the scenario (an autumn decline; common practice).
SEASONAL_AMPLITUDE = 0.06
SEASONAL_PEAK_DAY_OF_YEAR = 196.0

FEED_FILES = ("detectors.geojson", "counts.csv.gz", "truth.json")
COUNTS_HEADER = ("detector_id", "start", "count")


# --------------------------------------------------------------------------------------------
# Time-of-day profiles
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class DayShape:
    """Shape of one day type's traffic: a floor plus circular Gaussian bumps.

    Attributes
    ----------
    floor : float
        Constant part (relative units), the night-time level.
    bumps : tuple of (center_h, sigma_h, weight)
        Gaussian bumps in local clock hours, wrapped around midnight.
    """

    floor: float
    bumps: tuple[tuple[float, float, float], ...]

    def share(self, hour_local: np.ndarray) -> np.ndarray:
        """Share of the day's vehicles per hour at local clock hour ``hour_local`` (sums to 1)."""
        hour_local = np.asarray(hour_local, dtype=np.float64)
        value = np.full(hour_local.shape, self.floor)
        total = self.floor * 24.0
        for center, sigma, weight in self.bumps:
            for wrap in (-24.0, 0.0, 24.0):
                value += weight * np.exp(-0.5 * ((hour_local - center + wrap) / sigma) ** 2)
            total += weight * sigma * math.sqrt(2.0 * math.pi)
        return value / total


@dataclass(frozen=True, kw_only=True)
class TimeOfDayProfile:
    """Time-of-day shapes and daily totals by day type for one kind of detector.

    Attributes
    ----------
    name : str
        Key in :data:`PROFILES`.
    weekday, saturday, sunday_holiday : DayShape
        Shape of each day type (local wall-clock time).
    weekday_factors : tuple of 5 floats
        Daily total relative to ``base_daily_volume`` for Monday..Friday.
    saturday_factor, sunday_holiday_factor : float
        Daily total relative to ``base_daily_volume``.
    """

    name: str
    weekday: DayShape
    saturday: DayShape
    sunday_holiday: DayShape
    weekday_factors: tuple[float, float, float, float, float]
    saturday_factor: float
    sunday_holiday_factor: float


_FREEWAY_WEEKEND = (
    DayShape(floor=0.12, bumps=((13.5, 3.6, 1.0), (20.0, 2.0, 0.15))),
    DayShape(floor=0.10, bumps=((14.0, 3.4, 1.0),)),
)
_SURFACE_WEEKEND = (
    DayShape(floor=0.04, bumps=((13.5, 3.5, 1.0), (19.5, 1.8, 0.2))),
    DayShape(floor=0.03, bumps=((14.0, 3.3, 1.0),)),
)
_FREEWAY_DAYS = dict(
    weekday_factors=(0.97, 1.0, 1.01, 1.02, 1.05), saturday_factor=0.80, sunday_holiday_factor=0.68
)
_ARTERIAL_DAYS = dict(
    weekday_factors=(0.97, 1.0, 1.0, 1.02, 1.07), saturday_factor=0.85, sunday_holiday_factor=0.66
)

#: The built-in profiles, keyed by name.
PROFILES: dict[str, TimeOfDayProfile] = {
    p.name: p
    for p in (
        TimeOfDayProfile(
            name="freeway_inbound",
            weekday=DayShape(
                floor=0.10, bumps=((13.0, 3.8, 0.75), (7.6, 0.85, 0.85), (17.2, 1.1, 0.55))
            ),
            saturday=_FREEWAY_WEEKEND[0],
            sunday_holiday=_FREEWAY_WEEKEND[1],
            **_FREEWAY_DAYS,
        ),
        TimeOfDayProfile(
            name="freeway_outbound",
            weekday=DayShape(
                floor=0.10, bumps=((13.0, 3.8, 0.75), (7.5, 0.9, 0.5), (17.1, 1.05, 0.85))
            ),
            saturday=_FREEWAY_WEEKEND[0],
            sunday_holiday=_FREEWAY_WEEKEND[1],
            **_FREEWAY_DAYS,
        ),
        TimeOfDayProfile(
            name="ramp_on_am",
            weekday=DayShape(
                floor=0.05, bumps=((13.0, 4.0, 0.7), (7.5, 0.8, 1.0), (17.2, 1.1, 0.35))
            ),
            saturday=_SURFACE_WEEKEND[0],
            sunday_holiday=_SURFACE_WEEKEND[1],
            **_FREEWAY_DAYS,
        ),
        TimeOfDayProfile(
            name="ramp_off_pm",
            weekday=DayShape(
                floor=0.05, bumps=((13.0, 4.0, 0.7), (7.6, 0.9, 0.35), (17.2, 1.0, 1.0))
            ),
            saturday=_SURFACE_WEEKEND[0],
            sunday_holiday=_SURFACE_WEEKEND[1],
            **_FREEWAY_DAYS,
        ),
        TimeOfDayProfile(
            name="arterial",
            weekday=DayShape(
                floor=0.04,
                bumps=((13.0, 4.2, 0.8), (7.8, 0.8, 0.55), (12.3, 1.0, 0.35), (17.3, 1.1, 0.75)),
            ),
            saturday=_SURFACE_WEEKEND[0],
            sunday_holiday=_SURFACE_WEEKEND[1],
            **_ARTERIAL_DAYS,
        ),
        TimeOfDayProfile(
            # Night shares near 0.06 %/h: on a few hundred vehicles a day most night-time
            # 15-minute intervals are empty.
            name="local",
            weekday=DayShape(
                floor=0.002, bumps=((13.0, 3.0, 1.0), (7.4, 0.9, 0.45), (16.8, 1.2, 0.55))
            ),
            saturday=DayShape(floor=0.002, bumps=((13.5, 3.0, 1.0),)),
            sunday_holiday=DayShape(floor=0.002, bumps=((14.0, 2.8, 1.0),)),
            weekday_factors=(0.98, 1.0, 1.0, 1.0, 1.05),
            saturday_factor=0.90,
            sunday_holiday_factor=0.75,
        ),
    )
}


# --------------------------------------------------------------------------------------------
# Calendar and local time
# --------------------------------------------------------------------------------------------


def _nth_weekday(year: int, month: int, weekday: int, n: int) -> date:
    """The n-th (1-based; -1 = last) given weekday (Monday = 0) of a month."""
    if n > 0:
        first = date(year, month, 1)
        return first + timedelta(days=(weekday - first.weekday()) % 7 + 7 * (n - 1))
    last = date(year + month // 12, month % 12 + 1, 1) - timedelta(days=1)
    return last - timedelta(days=(last.weekday() - weekday) % 7)


def us_federal_holidays(year: int) -> dict[date, str]:
    """US federal holidays of ``year`` with their observed days, as the ``holidays.US`` calendar.

    A fixed-date holiday on a Saturday is observed the Friday before, on a Sunday the Monday
    after (5 U.S.C. 6103 and Executive Order 11582, from memory). New Year's Day falling on a
    Saturday is observed on 31 December of the previous year, which belongs to that year.
    Juneteenth counts from 2021. Valid for years from 2021.

    Parameters
    ----------
    year : int
        Calendar year (2021 or later).

    Returns
    -------
    dict of date to str
        Holiday dates and names.
    """
    days: dict[date, str] = {}
    fixed = (
        (1, 1, "New Year's Day"),
        (6, 19, "Juneteenth National Independence Day"),
        (7, 4, "Independence Day"),
        (11, 11, "Veterans Day"),
        (12, 25, "Christmas Day"),
    )
    for month, day, name in fixed:
        when = date(year, month, day)
        days[when] = name
        if when.weekday() == 5 and (month, day) != (1, 1):
            days[when - timedelta(days=1)] = f"{name} (observed)"
        elif when.weekday() == 6:
            days[when + timedelta(days=1)] = f"{name} (observed)"
    if date(year + 1, 1, 1).weekday() == 5:
        days[date(year, 12, 31)] = "New Year's Day (observed)"
    days[_nth_weekday(year, 1, 0, 3)] = "Martin Luther King Jr. Day"
    days[_nth_weekday(year, 2, 0, 3)] = "Washington's Birthday"
    days[_nth_weekday(year, 5, 0, -1)] = "Memorial Day"
    days[_nth_weekday(year, 9, 0, 1)] = "Labor Day"
    days[_nth_weekday(year, 10, 0, 2)] = "Columbus Day"
    days[_nth_weekday(year, 11, 3, 4)] = "Thanksgiving Day"
    return dict(sorted(days.items()))


def day_type_of(day: date, *, holiday_calendar: str = HOLIDAY_CALENDAR) -> str:
    """Day type of a local date: ``weekday``, ``saturday`` or ``sunday_holiday``."""
    if holiday_calendar != "US":
        raise ValueError(f"unsupported holiday calendar {holiday_calendar!r}")
    if day.weekday() == 6 or day in us_federal_holidays(day.year):
        return "sunday_holiday"
    return "saturday" if day.weekday() == 5 else "weekday"


def local_midnight_s(day: date, timezone: str) -> int:
    """Epoch seconds (UTC) of local midnight starting ``day`` in ``timezone``."""
    return int(datetime(day.year, day.month, day.day, tzinfo=ZoneInfo(timezone)).timestamp())


def format_rfc3339(start_s: np.ndarray, timezone: str) -> np.ndarray:
    """RFC 3339 local timestamps with UTC offset, e.g. ``2026-10-05T00:05:00-05:00``.

    Parameters
    ----------
    start_s : ndarray of int64
        Instants, epoch seconds (UTC).
    timezone : str
        IANA zone name.

    Returns
    -------
    ndarray of str (object)
        One timestamp per instant; each distinct instant is formatted once.
    """
    start_s = np.asarray(start_s, dtype=np.int64)
    unique, inverse = np.unique(start_s, return_inverse=True)
    tz = ZoneInfo(timezone)
    text = np.array([datetime.fromtimestamp(int(s), tz).isoformat() for s in unique], dtype=object)
    return text[inverse.reshape(-1)]


def _local_days(start_s: np.ndarray, timezone: str) -> tuple[np.ndarray, np.ndarray]:
    """Local day number (days since 1970-01-01 local) and local seconds since local midnight."""
    local_s = start_s + utc_offsets_s(start_s, timezone)
    return local_s // 86400, local_s % 86400


# --------------------------------------------------------------------------------------------
# Detectors, injections, network
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True)
class DetectorSpec:
    """One detector of the demo network and the parameters of its true traffic.

    Attributes
    ----------
    detector_id, label : str
        Stable identifier and human description.
    group : str or None
        Lanes of one approach or consecutive stations of one corridor; None when ungrouped.
        Detectors of a group share their day and hour factors.
    road_class : {"freeway", "arterial", "local"}
    facility : {"mainline", "ramp", "approach", "road"}
        Ramps have ``road_class="freeway"``.
    lanes : int
        Lanes covered by the detector.
    interval_s : int
        Reporting interval, seconds (divides 3600).
    timezone, holiday_calendar : str
    lon, lat : float
        WGS 84 degrees.
    base_daily_volume : float
        Vehicles on a Tuesday at the seasonal mean (before day and hour factors).
    profile : str
        Key of :data:`PROFILES`.
    day_shape, hour_shape : float or None
        Gamma shapes of the day and hour factors (variance ``1/shape``); None for none.
    """

    detector_id: str
    label: str
    group: str | None
    road_class: str
    facility: str
    lanes: int
    interval_s: int
    timezone: str = TIMEZONE
    holiday_calendar: str = HOLIDAY_CALENDAR
    lon: float
    lat: float
    base_daily_volume: float
    profile: str
    day_shape: float | None = None
    hour_shape: float | None = None

    def __post_init__(self) -> None:
        if self.road_class not in ROAD_CLASSES:
            raise ValueError(f"{self.detector_id}: road_class {self.road_class!r}")
        if self.facility not in FACILITIES:
            raise ValueError(f"{self.detector_id}: facility {self.facility!r}")
        if self.interval_s <= 0 or 3600 % self.interval_s:
            raise ValueError(f"{self.detector_id}: interval_s must divide 3600")
        if self.profile not in PROFILES:
            raise ValueError(f"{self.detector_id}: unknown profile {self.profile!r}")
        if self.holiday_calendar != "US":
            raise ValueError(f"{self.detector_id}: unsupported holiday calendar")
        for shape in (self.day_shape, self.hour_shape):
            if shape is not None and not shape > 0:
                raise ValueError(f"{self.detector_id}: gamma shapes must be positive")


@dataclass(frozen=True, kw_only=True)
class Injection:
    """Ground truth of one injected fault or traffic event.

    Attributes
    ----------
    id : str
    kind : str
        Alert kind expected from it (one of :data:`ALERT_KINDS`).
    cause : {"detector", "traffic", "communications"}
    detector_ids : tuple of str
    group : str or None
    start_s, end_s : int
        Window, epoch seconds UTC, end exclusive.
    period : {"history", "test"}
    description : str
    action : str
        What was done to the counts (one of :data:`ACTIONS`): ``zero`` (counts set to 0),
        ``scale`` (rate times ``factors[i]`` for ``detector_ids[i]``), ``scale_range`` (rate
        times a factor drawn uniformly in ``factors`` per interval), ``freeze`` (first count
        of the window, at least 1, repeated), ``absent`` (rows removed), ``patchy``
        (rows removed in short bursts, about ``factors[0]`` of them).
    factors : tuple of float
    """

    id: str
    kind: str
    cause: str
    detector_ids: tuple[str, ...]
    group: str | None
    start_s: int
    end_s: int
    period: str
    description: str
    action: str
    factors: tuple[float, ...] = ()

    def __post_init__(self) -> None:
        if self.kind not in ALERT_KINDS or self.cause not in CAUSES or self.action not in ACTIONS:
            raise ValueError(f"{self.id}: kind, cause or action not recognized")
        if self.end_s <= self.start_s or not self.detector_ids:
            raise ValueError(f"{self.id}: empty window or no detectors")
        if self.action == "scale" and len(self.factors) != len(self.detector_ids):
            raise ValueError(f"{self.id}: one factor per detector")


@dataclass(frozen=True, eq=False, kw_only=True)
class Network:
    """A generated network: detectors, counts (one row per reported interval) and ground truth.

    Attributes
    ----------
    detectors : list of DetectorSpec
        Sorted by ``detector_id``; ``detector_index`` points into it.
    detector_index : ndarray of int32
    start_s : ndarray of int64
        Interval start, epoch seconds UTC.
    count : ndarray of int64
        Vehicles per interval.
    injections : list of Injection
    history_start_s, test_start_s, end_s : int
        Local midnights (epoch seconds) bounding history ``[history_start_s, test_start_s)`` and
        test ``[test_start_s, end_s)``.
    seed : int
    scenario : str
    timezone : str
        Zone of the period bounds.
    lone_missing_fraction : float
        Probability of a lone missing interval (see :func:`generate_network`).

    Rows are sorted by start then detector; missing intervals are absent rows.
    """

    detectors: list[DetectorSpec]
    detector_index: np.ndarray
    start_s: np.ndarray
    count: np.ndarray
    injections: list[Injection]
    history_start_s: int
    test_start_s: int
    end_s: int
    seed: int = DEFAULT_SEED
    scenario: str = SCENARIO
    timezone: str = TIMEZONE
    lone_missing_fraction: float = LONE_MISSING_FRACTION
    _index_of: dict[str, int] = field(default_factory=dict, repr=False)

    def __post_init__(self) -> None:
        self._index_of.update({d.detector_id: i for i, d in enumerate(self.detectors)})

    def index_of(self, detector_id: str) -> int:
        """Position of ``detector_id`` in :attr:`detectors`."""
        return self._index_of[detector_id]

    def rows_of(self, detector_id: str) -> tuple[np.ndarray, np.ndarray]:
        """``(start_s, count)`` of one detector's reported intervals, in time order."""
        mask = self.detector_index == self.index_of(detector_id)
        return self.start_s[mask], self.count[mask]


def _station(
    *,
    detector_id: str,
    label: str,
    group: str | None,
    road_class: str,
    facility: str,
    lanes: int,
    interval_s: int,
    lon: float,
    lat: float,
    base_daily_volume: float,
    profile: str,
) -> DetectorSpec:
    # Day-to-day variation grows as roads get smaller (coefficients of variation about 9 %,
    # 11 %, 13 % and 20 %: common practice, not from a source); hour factor CV about 8 %.
    day_shape = {"mainline": 120.0, "ramp": 80.0, "approach": 60.0, "road": 25.0}[facility]
    return DetectorSpec(
        detector_id=detector_id,
        label=label,
        group=group,
        road_class=road_class,
        facility=facility,
        lanes=lanes,
        interval_s=interval_s,
        lon=round(lon, 6),
        lat=round(lat, 6),
        base_daily_volume=float(base_daily_volume),
        profile=profile,
        day_shape=day_shape,
        hour_shape=150.0,
    )


def default_detectors() -> list[DetectorSpec]:
    """The 60 detectors of Marrowick, sorted by ``detector_id``."""
    specs: list[DetectorSpec] = []
    lane_names = ("inside", "middle", "outside")
    lane_shares = (0.36, 0.34, 0.30)
    fwy_lon = -100.452

    def milepost_lat(mp: float) -> float:
        return 36.100 + mp * 0.01449

    # Kestrel Freeway runs north-south; downtown lies to the north, so northbound is inbound.
    for direction, mp, volume in (
        ("nb", 3.1, 44000),
        ("nb", 5.4, 51000),
        ("sb", 5.4, 50000),
        ("sb", 3.1, 43000),
    ):
        group = f"kfw-{direction}-{round(mp * 10):03d}"
        for lane in range(3):
            specs.append(
                _station(
                    detector_id=f"{group}-l{lane + 1}",
                    label=(
                        f"Kestrel Fwy {direction.upper()} at MP {mp:.1f}, "
                        f"lane {lane + 1} ({lane_names[lane]})"
                    ),
                    group=group,
                    road_class="freeway",
                    facility="mainline",
                    lanes=1,
                    interval_s=300,
                    lon=fwy_lon + (0.0003 if direction == "nb" else -0.0003) + lane * 0.00003,
                    lat=milepost_lat(mp),
                    base_daily_volume=volume * lane_shares[lane],
                    profile="freeway_inbound" if direction == "nb" else "freeway_outbound",
                )
            )
    specs.append(
        _station(
            detector_id="kfw-nb-080-l2",
            label="Kestrel Fwy NB at MP 8.0, lane 2 (middle), 1-minute counts",
            group=None,
            road_class="freeway",
            facility="mainline",
            lanes=1,
            interval_s=60,
            lon=fwy_lon + 0.00033,
            lat=milepost_lat(8.0),
            base_daily_volume=15500,
            profile="freeway_inbound",
        )
    )
    # Ramps at exits 4, 5 and 6 of Kestrel Freeway.
    cross_streets = {4: "Ashgrove Rd", 5: "Wickham St", 6: "Tollard Ave"}
    for direction, kind, volumes, profile in (
        ("nb", "on", (6500, 8200, 5900), "ramp_on_am"),
        ("sb", "off", (6200, 7800, 5600), "ramp_off_pm"),
    ):
        group = f"kfw-{direction}-{kind}"
        for exit_no, volume in zip((4, 5, 6), volumes, strict=True):
            specs.append(
                _station(
                    detector_id=f"{group}-x{exit_no}",
                    label=(
                        f"Kestrel Fwy {direction.upper()} {kind}-ramp "
                        f"at Exit {exit_no} ({cross_streets[exit_no]})"
                    ),
                    group=group,
                    road_class="freeway",
                    facility="ramp",
                    lanes=1,
                    interval_s=300,
                    lon=fwy_lon + (0.0012 if direction == "nb" else -0.0012),
                    lat=milepost_lat(exit_no) + (-0.002 if kind == "on" else 0.002),
                    base_daily_volume=volume,
                    profile=profile,
                )
            )
    # Orrin Expressway runs east-west; stations 0.6 mile apart, numbered in travel order, so
    # station 1 is the most upstream one. Each station detector covers both lanes.
    station_streets = ("Brisco Rd", "Ashgrove Rd", "Wickham St", "Tollard Ave")
    for direction, volumes, profile in (
        ("eb", (30000, 31500, 29000, 27500), "freeway_inbound"),
        ("wb", (28500, 30000, 30500, 29500), "freeway_outbound"),
    ):
        for k, volume in enumerate(volumes):
            west_to_east = k if direction == "eb" else 3 - k
            specs.append(
                _station(
                    detector_id=f"orx-{direction}-s{k + 1}",
                    label=(
                        f"Orrin Expy {direction.upper()} station {k + 1} "
                        f"near {station_streets[west_to_east]}, 2 lanes"
                    ),
                    group=f"orx-{direction}",
                    road_class="freeway",
                    facility="mainline",
                    lanes=2,
                    interval_s=300,
                    lon=-100.520 + west_to_east * 0.01077,
                    lat=36.192 + (0.0002 if direction == "eb" else -0.0002),
                    base_daily_volume=volume,
                    profile=profile,
                )
            )
    # Signalized approaches: lanes of one approach form a group.
    approaches = (
        (
            "bra3",
            "Brannock Ave & Third St",
            -100.470,
            36.176,
            300,
            {
                "nb": (("lt", 2400), ("t1", 7600), ("t2", 6900)),
                "sb": (("lt", 2100), ("t1", 7300), ("t2", 6600)),
                "eb": (("lt", 1500), ("t1", 4800), ("rt", 1900)),
                "wb": (("lt", 1300), ("t1", 4500), ("rt", 2200)),
            },
        ),
        (
            "fencal",
            "Fenwright Rd & Calder St",
            -100.495,
            36.163,
            900,
            {
                "eb": (("lt", 2000), ("t1", 6800), ("t2", 6400), ("rt", 1700)),
                "wb": (("lt", 1800), ("t1", 6500), ("t2", 6100), ("rt", 1900)),
                "nb": (("lt", 1200), ("th", 4200), ("rt", 1400)),
                "sb": (("lt", 1100), ("th", 3900), ("rt", 1500)),
            },
        ),
    )
    lane_words = {
        "lt": "left-turn lane",
        "rt": "right-turn lane",
        "th": "through lane",
        "t1": "through lane 1",
        "t2": "through lane 2",
    }
    offsets = {"nb": (0.0, -0.0004), "sb": (0.0, 0.0004), "eb": (-0.0005, 0.0), "wb": (0.0005, 0.0)}
    for prefix, name, lon, lat, interval_s, legs in approaches:
        for leg, lanes in legs.items():
            for j, (lane, volume) in enumerate(lanes):
                dlon, dlat = offsets[leg]
                specs.append(
                    _station(
                        detector_id=f"{prefix}-{leg}-{lane}",
                        label=f"{name}, {leg.upper()} approach, {lane_words[lane]}",
                        group=f"{prefix}-{leg}",
                        road_class="arterial",
                        facility="approach",
                        lanes=1,
                        interval_s=interval_s,
                        lon=lon + dlon + j * 0.00002,
                        lat=lat + dlat + j * 0.00002,
                        base_daily_volume=volume,
                        profile="arterial",
                    )
                )
    # Rural roads with 15-minute count stations.
    for detector_id, label, group, lanes, lon, lat, volume in (
        ("qry-01-eb", "Quarry Rd east of Brisco Rd, eastbound", "qry", 1, -100.620, 36.140, 450),
        ("qry-01-wb", "Quarry Rd east of Brisco Rd, westbound", "qry", 1, -100.620, 36.1402, 470),
        ("qry-02-eb", "Quarry Rd at Hatchet Creek, eastbound", "qry", 1, -100.655, 36.138, 380),
        (
            "lnp-01-nb",
            "Linden Pike north of Fenwright Rd, northbound",
            "lnp",
            1,
            -100.400,
            36.250,
            700,
        ),
        (
            "lnp-01-sb",
            "Linden Pike north of Fenwright Rd, southbound",
            "lnp",
            1,
            -100.4002,
            36.250,
            650,
        ),
        ("lnp-02-nb", "Linden Pike at Cobb Hollow, northbound", "lnp", 1, -100.396, 36.281, 600),
        (
            "oml-01",
            "Old Mill Ln near the grain elevator, both directions",
            None,
            2,
            -100.580,
            36.220,
            280,
        ),
    ):
        specs.append(
            _station(
                detector_id=detector_id,
                label=label,
                group=group,
                road_class="local",
                facility="road",
                lanes=lanes,
                interval_s=900,
                lon=lon,
                lat=lat,
                base_daily_volume=volume,
                profile="local",
            )
        )
    return sorted(specs, key=lambda s: s.detector_id)


def expected_rate(spec: DetectorSpec, start_s: np.ndarray) -> np.ndarray:
    """True mean count of the intervals starting at ``start_s``, before faults and events.

    Returns ``base_daily_volume * share * interval_s / 3600 * day_total_factor * seasonal``:
    ``share`` is the profile's share of the day per hour for the local day type, evaluated at
    the interval's midpoint in local wall-clock hours; ``day_total_factor`` is the profile's
    factor for the weekday (Monday..Friday) or day type; ``seasonal`` is
    ``1 + SEASONAL_AMPLITUDE * cos(2 pi (day_of_year - SEASONAL_PEAK_DAY_OF_YEAR) / 365.25)``
    of the local date. The gamma day and hour factors (mean 1) are not included, so this is
    the mean of the simulated counts over those factors.

    Parameters
    ----------
    spec : DetectorSpec
    start_s : ndarray of int64
        Interval starts, epoch seconds UTC.

    Returns
    -------
    ndarray of float64
        Vehicles per interval.
    """
    start_s = np.asarray(start_s, dtype=np.int64)
    profile = PROFILES[spec.profile]
    local_day, seconds = _local_days(start_s, spec.timezone)
    hour_mid = (seconds + spec.interval_s / 2.0) / 3600.0
    days, inverse = np.unique(local_day, return_inverse=True)
    inverse = inverse.reshape(-1)
    share = np.empty(start_s.shape, dtype=np.float64)
    day_factor = np.empty(days.shape, dtype=np.float64)
    seasonal = np.empty(days.shape, dtype=np.float64)
    shapes = {
        "weekday": profile.weekday,
        "saturday": profile.saturday,
        "sunday_holiday": profile.sunday_holiday,
    }
    for k, number in enumerate(days):
        day = date(1970, 1, 1) + timedelta(days=int(number))
        kind = day_type_of(day, holiday_calendar=spec.holiday_calendar)
        if kind == "weekday":
            day_factor[k] = profile.weekday_factors[day.weekday()]
        elif kind == "saturday":
            day_factor[k] = profile.saturday_factor
        else:
            day_factor[k] = profile.sunday_holiday_factor
        seasonal[k] = 1.0 + SEASONAL_AMPLITUDE * math.cos(
            2.0 * math.pi * (day.timetuple().tm_yday - SEASONAL_PEAK_DAY_OF_YEAR) / 365.25
        )
        rows = inverse == k
        share[rows] = shapes[kind].share(hour_mid[rows])
    return (
        spec.base_daily_volume
        * share
        * (spec.interval_s / 3600.0)
        * day_factor[inverse]
        * seasonal[inverse]
    )


# --------------------------------------------------------------------------------------------
# The scenario's faults and events
# --------------------------------------------------------------------------------------------


def _scenario_injections(
    detectors: Sequence[DetectorSpec], *, timezone: str, test_start_s: int
) -> list[Injection]:
    """The Marrowick scenario: faults in the history (robust fitting) and in the test period."""
    group_of = {d.detector_id: d.group for d in detectors}
    members: dict[str, tuple[str, ...]] = {}
    for d in detectors:
        if d.group is not None:
            members[d.group] = (*members.get(d.group, ()), d.detector_id)

    def at(y: int, m: int, d: int, hh: int = 0, mm: int = 0) -> int:
        return int(datetime(y, m, d, hh, mm, tzinfo=ZoneInfo(timezone)).timestamp())

    day_start, offline_start = at(2026, 11, 23), at(2026, 11, 24, 10, 15)
    # fmt: off
    plan = (
        # id, kind, cause, detectors, start, end, action, factors, description
        ("H01", "zero_counts", "detector", ("kfw-nb-054-l2",),
         at(2026, 10, 22), at(2026, 10, 23), "zero", (),
         "Dead loop card for a whole Thursday: zeros on one freeway lane."),
        ("H02", "high_volume", "detector", ("bra3-nb-t1",),
         at(2026, 10, 27, 13), at(2026, 10, 27, 18), "scale_range", (2.0, 3.0),
         "Chattering loop for an afternoon: counts x2-3 on one approach lane."),
        ("H03", "no_reports", "communications", members.get("lnp", ()),
         at(2026, 11, 4, 2), at(2026, 11, 4, 6), "absent", (),
         "Linden Pike cabinet modem down overnight: no reports from the group for 4 h."),
        ("H04", "repeated_value", "detector", ("kfw-sb-off-x4",),
         at(2026, 11, 7, 8), at(2026, 11, 7, 14), "freeze", (),
         "Polling fault on a Saturday morning: one off-ramp repeats one count for 6 h."),
        ("T01", "zero_counts", "detector", ("kfw-sb-054-l1",),
         at(2026, 11, 17, 17, 10), at(2026, 11, 18, 11), "zero", (),
         "Freeway lane stuck at zero from the PM peak until the next morning."),
        ("T02", "zero_counts", "detector", ("bra3-wb-t1",),
         at(2026, 11, 19, 1, 40), at(2026, 11, 19, 18), "zero", (),
         "Approach lane stuck at zero from 01:40; noticeable only once morning traffic builds."),
        ("T03", "high_volume", "detector", ("fencal-wb-t1",),
         at(2026, 11, 18, 10), at(2026, 11, 18, 15, 30), "scale_range", (2.0, 3.0),
         "Crosstalk on a 15-minute through lane: counts x2-3 for 5.5 h."),
        ("T04", "over_capacity", "detector", ("kfw-sb-031-l2",),
         at(2026, 11, 20, 15), at(2026, 11, 20, 19), "scale_range", (2.6, 3.0),
         "Chattering freeway lane through the PM peak: x2.6-3, beyond lane capacity."),
        ("T05", "zero_counts", "detector", ("fencal-eb-t2",),
         at(2026, 11, 20, 9), at(2026, 11, 21, 12), "zero", (),
         "One lane of the eastbound through pair dead; its neighbor t1 counts normally."),
        ("T06", "repeated_value", "detector", ("kfw-nb-on-x5",),
         at(2026, 11, 21, 13), at(2026, 11, 22, 9), "freeze", (),
         "Frozen controller: one on-ramp repeats the same nonzero count for 20 h."),
        ("T07", "no_reports", "communications", ("bra3-sb-t1",),
         day_start, day_start + 86400, "patchy", (0.33,),
         "Flaky serial link: about a third of one lane's reports lost in short bursts all day."),
        ("T08", "no_reports", "communications", members.get("bra3-eb", ()),
         offline_start, offline_start + 3600, "absent", (),
         "Brannock & Third eastbound controller offline for an hour."),
        ("T09", "low_volume", "detector", ("orx-wb-s2",),
         at(2026, 11, 16, 6), at(2026, 11, 18, 6), "scale", (0.55,),
         "Loop sensitivity drift: one station counts 55 % of its traffic for two days."),
        ("T10", "low_volume", "traffic", ("orx-eb-s2", "orx-eb-s3", "orx-eb-s4"),
         at(2026, 11, 25, 16, 20), at(2026, 11, 25, 17, 5), "scale", (0.40, 0.30, 0.35),
         "Crash blocking a lane near station 3 in the PM peak: stations 2-4 drop to "
         "30-40 % for 45 min."),
        ("T11", "high_volume", "traffic", ("orx-eb-s2", "orx-eb-s3", "orx-eb-s4"),
         at(2026, 11, 25, 17, 5), at(2026, 11, 25, 17, 25), "scale", (1.6, 1.5, 1.5),
         "Queue discharge after the crash clears: stations 2-4 x1.5-1.6 for 20 min "
         "(upstream one most)."),
        ("T12", "high_volume", "traffic", members.get("fencal-nb", ()),
         at(2026, 11, 28, 17, 30), at(2026, 11, 28, 20), "scale", (2.2,),
         "Arena event on Saturday evening: Calder St northbound approach x2.2 for 2.5 h."),
        ("T13", "zero_counts", "detector", ("qry-01-eb",),
         at(2026, 11, 22, 22), at(2026, 11, 24, 12), "zero", (),
         "Rural count station stuck at zero from Sunday night; night zeros are normal here."),
    )
    # fmt: on
    injections = []
    for ident, kind, cause, ids, start, end, action, factors, description in plan:
        if not ids or any(i not in group_of for i in ids):
            continue
        groups = {group_of[i] for i in ids}
        if action == "scale" and len(factors) == 1:
            factors = factors * len(ids)
        injections.append(
            Injection(
                id=ident,
                kind=kind,
                cause=cause,
                detector_ids=tuple(ids),
                group=groups.pop() if len(groups) == 1 else None,
                start_s=start,
                end_s=end,
                period="history" if start < test_start_s else "test",
                description=description,
                action=action,
                factors=tuple(float(f) for f in factors),
            )
        )
    return injections


# --------------------------------------------------------------------------------------------
# Generation
# --------------------------------------------------------------------------------------------


def _gamma_factors(rng: np.random.Generator, shape: float | None, size: int) -> np.ndarray:
    if shape is None:
        return np.ones(size)
    return rng.gamma(shape, 1.0 / shape, size=size)


def _burst_gaps(rng: np.random.Generator, size: int, fraction: float) -> np.ndarray:
    """Mask (True = lost) of bursts of 1-4 intervals covering about ``fraction`` of ``size``."""
    lost = np.zeros(size, dtype=bool)
    mean_gap = 2.5
    mean_run = mean_gap * (1.0 - fraction) / fraction
    position = int(rng.geometric(1.0 / mean_run)) - 1
    while position < size:
        length = int(rng.integers(1, 5))
        lost[position : position + length] = True
        position += length + int(rng.geometric(1.0 / mean_run))
    return lost


def generate_network(
    *,
    seed: int = DEFAULT_SEED,
    detectors: Sequence[DetectorSpec] | None = None,
    history_start: date = HISTORY_START,
    history_days: int = HISTORY_DAYS,
    test_days: int = TEST_DAYS,
    inject: bool = True,
    lone_missing_fraction: float = LONE_MISSING_FRACTION,
    timezone: str = TIMEZONE,
) -> Network:
    """Generate the demo network's counts and ground truth.

    Parameters
    ----------
    seed : int
        Seed of ``np.random.SeedSequence``; the output is a pure function of the arguments.
    detectors : sequence of DetectorSpec, optional
        Defaults to :func:`default_detectors`. Detectors of one group must share
        ``day_shape`` and ``hour_shape``.
    history_start : date
        First local day of the history period.
    history_days, test_days : int
        Lengths of the history and test periods, local days.
    inject : bool
        Apply the scenario's faults and events (only those whose detectors all exist and whose
        window lies in the generated span, so a custom detector list usually gets none).
    lone_missing_fraction : float
        Probability that an interval is missing on its own (never two in a row, and kept one
        interval clear of the scenario's absence windows whether or not they are injected).
    timezone : str
        Zone of the local days bounding the periods.

    Returns
    -------
    Network
    """
    specs = sorted(
        detectors if detectors is not None else default_detectors(), key=lambda s: s.detector_id
    )
    ids = [s.detector_id for s in specs]
    if len(set(ids)) != len(ids):
        raise ValueError("duplicate detector_id")
    history_start_s = local_midnight_s(history_start, timezone)
    test_start_s = local_midnight_s(history_start + timedelta(days=history_days), timezone)
    end_s = local_midnight_s(history_start + timedelta(days=history_days + test_days), timezone)
    first_day = (history_start - date(1970, 1, 1)).days
    n_days = history_days + test_days
    first_hour = history_start_s // 3600
    n_hours = (end_s - history_start_s) // 3600

    scenario = [
        inj
        for inj in _scenario_injections(specs, timezone=timezone, test_start_s=test_start_s)
        if history_start_s <= inj.start_s and inj.end_s <= end_s
    ]
    injections = scenario if inject else []

    root = np.random.SeedSequence(seed)
    group_seq, detector_seq = root.spawn(2)
    group_keys = sorted({s.group if s.group is not None else f"~{s.detector_id}" for s in specs})
    day_factor: dict[str, np.ndarray] = {}
    hour_factor: dict[str, np.ndarray] = {}
    for key, child in zip(group_keys, group_seq.spawn(len(group_keys)), strict=True):
        group_specs = [s for s in specs if (s.group or f"~{s.detector_id}") == key]
        shapes = {(s.day_shape, s.hour_shape) for s in group_specs}
        if len(shapes) != 1:
            raise ValueError(f"group {key}: detectors must share day_shape and hour_shape")
        day_shape, hour_shape = shapes.pop()
        rng = np.random.default_rng(child)
        day_factor[key] = _gamma_factors(rng, day_shape, n_days)
        hour_factor[key] = _gamma_factors(rng, hour_shape, n_hours)

    parts_index, parts_start, parts_count = [], [], []
    for index, (spec, child) in enumerate(zip(specs, detector_seq.spawn(len(specs)), strict=True)):
        count_rng, missing_rng, inject_rng = (np.random.default_rng(s) for s in child.spawn(3))
        key = spec.group if spec.group is not None else f"~{spec.detector_id}"
        starts = np.arange(history_start_s, end_s, spec.interval_s, dtype=np.int64)
        local_day, _ = _local_days(starts, spec.timezone)
        rate = (
            expected_rate(spec, starts)
            * day_factor[key][local_day - first_day]
            * hour_factor[key][starts // 3600 - first_hour]
        )
        counts = count_rng.poisson(rate).astype(np.int64)
        present = np.ones(starts.shape, dtype=bool)

        lone = missing_rng.random(starts.shape) < lone_missing_fraction
        lone[1:] &= ~lone[:-1]
        for inj in scenario:
            if spec.detector_id in inj.detector_ids and inj.action in ("absent", "patchy"):
                lone &= ~(
                    (starts >= inj.start_s - spec.interval_s)
                    & (starts < inj.end_s + spec.interval_s)
                )
        present &= ~lone

        for inj in injections:
            if spec.detector_id not in inj.detector_ids:
                continue
            window = (starts >= inj.start_s) & (starts < inj.end_s)
            if inj.action == "zero":
                counts[window] = 0
            elif inj.action == "freeze":
                counts[window] = max(int(counts[window][0]), 1)
            elif inj.action == "absent":
                present &= ~window
            elif inj.action == "patchy":
                lost = _burst_gaps(inject_rng, int(window.sum()), inj.factors[0])
                present[np.flatnonzero(window)[lost]] = False
            else:
                if inj.action == "scale":
                    factor = np.full(
                        int(window.sum()), inj.factors[inj.detector_ids.index(spec.detector_id)]
                    )
                else:
                    factor = inject_rng.uniform(inj.factors[0], inj.factors[1], int(window.sum()))
                if np.all(factor <= 1.0):
                    counts[window] = inject_rng.binomial(counts[window], factor)
                else:
                    counts[window] += inject_rng.poisson(
                        rate[window] * np.maximum(factor - 1.0, 0.0)
                    )
        parts_index.append(np.full(int(present.sum()), index, dtype=np.int32))
        parts_start.append(starts[present])
        parts_count.append(counts[present])

    detector_index = np.concatenate(parts_index)
    start_s = np.concatenate(parts_start)
    count = np.concatenate(parts_count)
    order = np.lexsort((detector_index, start_s))
    return Network(
        detectors=list(specs),
        detector_index=detector_index[order],
        start_s=start_s[order],
        count=count[order],
        injections=injections,
        history_start_s=history_start_s,
        test_start_s=test_start_s,
        end_s=end_s,
        seed=seed,
        timezone=timezone,
        lone_missing_fraction=lone_missing_fraction,
    )


# --------------------------------------------------------------------------------------------
# Feed files
# --------------------------------------------------------------------------------------------


def _rfc3339_one(instant_s: int, timezone: str) -> str:
    return datetime.fromtimestamp(int(instant_s), ZoneInfo(timezone)).isoformat()


def detectors_geojson(network: Network) -> dict:
    """RFC 7946 FeatureCollection of the detectors (Point geometry ``[lon, lat]``)."""
    features = []
    for spec in network.detectors:
        features.append(
            {
                "type": "Feature",
                "id": spec.detector_id,
                "geometry": {"type": "Point", "coordinates": [spec.lon, spec.lat]},
                "properties": {
                    "detector_id": spec.detector_id,
                    "label": spec.label,
                    "group": spec.group,
                    "road_class": spec.road_class,
                    "lanes": spec.lanes,
                    "interval_s": spec.interval_s,
                    "timezone": spec.timezone,
                    "holiday_calendar": spec.holiday_calendar,
                },
            }
        )
    return {"type": "FeatureCollection", "features": features}


def truth_document(network: Network) -> dict:
    """The ``truth.json`` content: periods and injected faults and events (local RFC 3339 times)."""
    tz = network.timezone
    return {
        "scenario": network.scenario,
        "seed": network.seed,
        "timezone": tz,
        "history": {
            "start": _rfc3339_one(network.history_start_s, tz),
            "end": _rfc3339_one(network.test_start_s, tz),
        },
        "test": {
            "start": _rfc3339_one(network.test_start_s, tz),
            "end": _rfc3339_one(network.end_s, tz),
        },
        "background": {
            "lone_missing_fraction": network.lone_missing_fraction,
            "lone_missing": "isolated single intervals missing on every detector (absent rows)",
            "model": "Poisson x gamma day factor (per group and local day) x gamma hour factor",
        },
        "injections": [
            {
                "id": inj.id,
                "kind": inj.kind,
                "cause": inj.cause,
                "detector_ids": list(inj.detector_ids),
                "group": inj.group,
                "start": _rfc3339_one(inj.start_s, tz),
                "end": _rfc3339_one(inj.end_s, tz),
                "period": inj.period,
                "description": inj.description,
                "effect": {"action": inj.action, "factors": list(inj.factors)},
            }
            for inj in network.injections
        ],
    }


def counts_csv_bytes(network: Network) -> bytes:
    """The uncompressed counts CSV: header ``detector_id,start,count``, rows in network order."""
    start_text = np.empty(network.start_s.shape, dtype=object)
    zones = np.array([d.timezone for d in network.detectors], dtype=object)
    row_zone = zones[network.detector_index]
    for zone in sorted(set(zones.tolist())):
        rows = row_zone == zone
        start_text[rows] = format_rfc3339(network.start_s[rows], zone)
    ids = np.array([d.detector_id for d in network.detectors], dtype=object)[network.detector_index]
    lines = [",".join(COUNTS_HEADER)]
    lines.extend(
        f"{i},{s},{c}"
        for i, s, c in zip(ids.tolist(), start_text.tolist(), network.count.tolist(), strict=True)
    )
    lines.append("")
    return "\n".join(lines).encode("ascii")


def _gzip_bytes(payload: bytes) -> bytes:
    # mtime=0 and an empty file name keep the gzip header free of timestamps and paths.
    buffer = io.BytesIO()
    with gzip.GzipFile(filename="", mode="wb", fileobj=buffer, compresslevel=9, mtime=0) as out:
        out.write(payload)
    return buffer.getvalue()


def _json_bytes(document: dict) -> bytes:
    return (json.dumps(document, indent=2, ensure_ascii=True) + "\n").encode("ascii")


def write_feed(network: Network, folder: str | Path) -> dict:
    """Write ``detectors.geojson``, ``counts.csv.gz`` and ``truth.json`` into ``folder``.

    The files are byte-identical for identical networks (gzip mtime 0, no file name, fixed
    JSON formatting).

    Returns
    -------
    dict
        ``{"files": {name: {"path", "bytes", "sha256"}}, "rows": int, "detectors": int}``.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    payloads = {
        "detectors.geojson": _json_bytes(detectors_geojson(network)),
        "counts.csv.gz": _gzip_bytes(counts_csv_bytes(network)),
        "truth.json": _json_bytes(truth_document(network)),
    }
    files = {}
    for name, payload in payloads.items():
        path = folder / name
        path.write_bytes(payload)
        files[name] = {
            "path": str(path),
            "bytes": len(payload),
            "sha256": hashlib.sha256(payload).hexdigest(),
        }
    return {"files": files, "rows": int(network.count.size), "detectors": len(network.detectors)}


def read_counts_csv(path: str | Path) -> Iterator[tuple[str, str, int]]:
    """Yield ``(detector_id, start, count)`` rows of a counts CSV, gzip-compressed or plain.

    Tolerates a byte-order mark, CRLF line ends, blank lines, spaces around fields, columns in
    any order (found by the header) and integral counts written as ``12.0``.

    Raises
    ------
    ValueError
        On a missing column or a count that is not a non-negative integer (with line number).
    """
    raw = Path(path).read_bytes()
    if raw[:2] == b"\x1f\x8b":
        raw = gzip.decompress(raw)
    reader = csv.reader(io.StringIO(raw.decode("utf-8-sig"), newline=""))
    header: list[str] | None = None
    for line_no, row in enumerate(reader, start=1):
        cells = [c.strip() for c in row]
        if not any(cells):
            continue
        if header is None:
            header = [c.lower() for c in cells]
            missing = [c for c in COUNTS_HEADER if c not in header]
            if missing:
                raise ValueError(f"line {line_no}: missing columns {missing}")
            where = [header.index(c) for c in COUNTS_HEADER]
            continue
        try:
            value = float(cells[where[2]])
        except (ValueError, IndexError) as exc:
            raise ValueError(f"line {line_no}: bad row {row!r}") from exc
        if not value.is_integer() or value < 0:
            raise ValueError(f"line {line_no}: count {cells[where[2]]!r} is not a whole number")
        yield cells[where[0]], cells[where[1]], int(value)


def read_counts_arrays(
    path: str | Path, detector_ids: Sequence[str]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Read a counts CSV into ``(detector_index int32, start_s int64, count int64)`` arrays.

    ``detector_index`` indexes ``detector_ids``; rows stay in file order.
    """
    position = {d: i for i, d in enumerate(detector_ids)}
    seen: dict[str, int] = {}
    index, start, count = [], [], []
    for detector_id, text, value in read_counts_csv(path):
        if text not in seen:
            seen[text] = parse_rfc3339(text)
        index.append(position[detector_id])
        start.append(seen[text])
        count.append(value)
    return (
        np.array(index, dtype=np.int32),
        np.array(start, dtype=np.int64),
        np.array(count, dtype=np.int64),
    )


def main(argv: Sequence[str] | None = None) -> int:
    """Command line: ``python -m service.tools.simulate --out seed_feed --seed 20261116``."""
    parser = argparse.ArgumentParser(description="Generate the Marrowick demo detector feed.")
    parser.add_argument("--out", default="seed_feed", help="output folder (default seed_feed)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="random seed")
    args = parser.parse_args(argv)
    network = generate_network(seed=args.seed)
    report = write_feed(network, args.out)
    print(
        f"{report['detectors']} detectors, {report['rows']} rows, "
        f"{len(network.injections)} injections"
    )
    for name, info in report["files"].items():
        print(f"{name}: {info['bytes']} bytes sha256 {info['sha256']}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
