"""Specifications of the demo network generator (service/simulate.py).

Statistical checks use fixed seeds; each states its tolerance and how rarely it could fail by
chance for another seed. The fault checks compare the injected network with the same seed
generated without injections: both share every random stream, so outside the injection windows
they are identical and inside them the ratio of counts shows the injected effect.
"""

from __future__ import annotations

import gzip
import hashlib
import json
import math
from datetime import date, datetime
from pathlib import Path
from zoneinfo import ZoneInfo

import holidays
import numpy as np
import pytest
from scipy import stats

from service.timefmt import utc_offsets_s
from service.tools import simulate
from service.tools.simulate import (
    DetectorSpec,
    day_type_of,
    expected_rate,
    generate_network,
    read_counts_arrays,
    read_counts_csv,
    us_federal_holidays,
    write_feed,
)

REPO = Path(__file__).resolve().parents[2]
SEED_FEED = REPO / "seed_feed"
TZ = ZoneInfo("America/Chicago")
# Turner (TTI for FHWA, 2007): about 3,000 veh/h/lane maximum, i.e. 250 per 5 minutes per lane
# (Quality Control Procedures for Archived Operations Traffic Data; value from memory).
MAX_PER_5MIN_PER_LANE = 250


@pytest.fixture(scope="module")
def network() -> simulate.Network:
    return generate_network()


@pytest.fixture(scope="module")
def fault_free() -> simulate.Network:
    return generate_network(inject=False)


@pytest.fixture(scope="module")
def feed(network, tmp_path_factory) -> tuple[Path, dict]:
    folder = tmp_path_factory.mktemp("feed")
    return folder, write_feed(network, folder)


def _spec(
    detector_id: str,
    *,
    profile: str = "arterial",
    interval_s: int = 300,
    volume: float = 6000.0,
    day_shape: float | None = 60.0,
    hour_shape: float | None = 150.0,
    road_class: str = "arterial",
) -> DetectorSpec:
    return DetectorSpec(
        detector_id=detector_id,
        label=detector_id,
        group=None,
        road_class=road_class,
        facility="approach",
        lanes=1,
        interval_s=interval_s,
        lon=-100.5,
        lat=36.2,
        base_daily_volume=volume,
        profile=profile,
        day_shape=day_shape,
        hour_shape=hour_shape,
    )


def _mixed_specs(*, day_shape: float | None, hour_shape: float | None) -> list[DetectorSpec]:
    """Eight ungrouped 5-minute detectors spanning the profiles and volumes of the city."""
    kinds = (
        ("freeway_inbound", 15000, "freeway"),
        ("freeway_outbound", 14000, "freeway"),
        ("ramp_on_am", 7000, "freeway"),
        ("ramp_off_pm", 6500, "freeway"),
        ("arterial", 7000, "arterial"),
        ("arterial", 2000, "arterial"),
        ("local", 900, "local"),
        ("local", 2500, "local"),
    )
    return [
        _spec(
            f"d{k}", profile=p, volume=v, road_class=rc, day_shape=day_shape, hour_shape=hour_shape
        )
        for k, (p, v, rc) in enumerate(kinds)
    ]


def _local(start_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    local_s = start_s + utc_offsets_s(start_s, "America/Chicago")
    return local_s // 86400, local_s % 86400


def _window(net: simulate.Network, detector_id: str, start_s: int, end_s: int):
    starts, counts = net.rows_of(detector_id)
    inside = (starts >= start_s) & (starts < end_s)
    return starts[inside], counts[inside]


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# ---------------------------------------------------------------------------------------------
# Rates and dispersion
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("day_shape", "hour_shape"), [(None, None), (60.0, 150.0)])
def test_realised_mean_per_time_of_day_bin_matches_expected_rate(day_shape, hour_shape):
    """Summed counts per detector and local 5-minute bin agree with expected_rate within 5.5 sd."""
    specs = _mixed_specs(day_shape=day_shape, hour_shape=hour_shape)
    net = generate_network(
        seed=11,
        detectors=specs,
        history_days=28,
        test_days=0,
        inject=False,
        lone_missing_fraction=0.0,
    )
    # Var of Poisson(mu * D * H) with independent mean-1 gammas: mu + mu^2 ((1+1/kd)(1+1/kh) - 1).
    excess = (1 + 1 / (day_shape or math.inf)) * (1 + 1 / (hour_shape or math.inf)) - 1
    z_values = []
    for spec in specs:
        starts, counts = net.rows_of(spec.detector_id)
        mu = expected_rate(spec, starts)
        _, seconds = _local(starts)
        tod_bin = seconds // 300
        total = np.bincount(tod_bin, weights=counts, minlength=288)
        mean = np.bincount(tod_bin, weights=mu, minlength=288)
        var = np.bincount(tod_bin, weights=mu + mu**2 * excess, minlength=288)
        keep = mean >= 50  # where the normal approximation to the summed counts is sound
        z_values.append((total[keep] - mean[keep]) / np.sqrt(var[keep]))
    z = np.concatenate(z_values)
    assert z.size > 1500
    # Each |z| > 5.5 has probability about 4e-8; over about 2,000 bins the chance is below 1e-4.
    assert np.max(np.abs(z)) < 5.5
    if day_shape is None and hour_shape is None:
        # Pure Poisson bins are independent: mean z has sd 1/sqrt(n) < 0.025, so 0.15 is 6 sd;
        # a rate off by 3 % moves it by about 1 and is caught.
        assert abs(np.mean(z)) < 0.15
        assert np.var(z) == pytest.approx(1.0, abs=0.2)  # sd of var(z) about 0.03


def test_day_factor_variance_is_recovered_from_daily_totals():
    """Method-of-moments and statsmodels NB2 estimates of 1/day_shape from daily totals agree."""
    import statsmodels.api as sm

    day_shape = 8.0
    specs = [
        _spec(
            f"a{k:02d}", interval_s=900, volume=2000 + 150 * k, day_shape=day_shape, hour_shape=None
        )
        for k in range(30)
    ]
    net = generate_network(
        seed=5,
        detectors=specs,
        history_days=56,
        test_days=0,
        inject=False,
        lone_missing_fraction=0.0,
    )
    totals, means = [], []
    for spec in specs:
        starts, counts = net.rows_of(spec.detector_id)
        day, _ = _local(starts)
        first = day.min()
        totals.append(np.bincount(day - first, weights=counts))
        means.append(np.bincount(day - first, weights=expected_rate(spec, starts)))
    total = np.concatenate(totals)
    mean = np.concatenate(means)
    # T | D ~ Poisson(D m) and Var D = 1/k give E[(T/m - 1)^2] = 1/k + 1/m: the method of
    # moments alpha = (s^2 - xbar)/xbar^2 (Hilbe, Negative Binomial Regression) with a known mean.
    alpha_mom = np.mean((total / mean - 1.0) ** 2 - 1.0 / mean)
    # Relative sd of this estimate over 1,680 days is about 4 %; 20 % is 5 sd (chance < 1e-6).
    assert alpha_mom == pytest.approx(1 / day_shape, rel=0.20)
    # Outside check: statsmodels' negative binomial (NB2, Var = mu + alpha mu^2) ML fit with
    # offset log m estimates the same alpha, and an intercept near 0 (mean factor 1).
    fit = sm.NegativeBinomial(total, np.ones((total.size, 1)), offset=np.log(mean)).fit(disp=0)
    intercept, alpha_ml = fit.params
    assert alpha_ml == pytest.approx(1 / day_shape, rel=0.20)
    assert abs(intercept) < 0.03  # sd about 0.009 (sqrt(1/k / 1680))


def test_counts_are_poisson_without_day_or_hour_factors():
    """Without gamma factors the Pearson dispersion is 1 and zero frequencies follow Poisson."""
    specs = _mixed_specs(day_shape=None, hour_shape=None)
    net = generate_network(
        seed=3,
        detectors=specs,
        history_days=28,
        test_days=0,
        inject=False,
        lone_missing_fraction=0.0,
    )
    counts = [net.rows_of(s.detector_id)[1] for s in specs]
    mus = [expected_rate(s, net.rows_of(s.detector_id)[0]) for s in specs]
    count = np.concatenate(counts)
    mu = np.concatenate(mus)
    busy = mu >= 1.0
    # Pearson dispersion phi = X^2 / n (Hilbe): each term has variance 2 + 1/mu <= 3, so over
    # about 50,000 intervals its sd is below 0.008; 0.04 is over 5 sd (chance < 1e-6).
    phi = np.mean((count[busy] - mu[busy]) ** 2 / mu[busy])
    assert phi == pytest.approx(1.0, abs=0.04)
    # Quiet intervals: observed zeros against the Poisson zero probabilities (scipy.stats).
    quiet = mu < 2.0
    p0 = stats.poisson.pmf(0, mu[quiet])
    z = (np.sum(count[quiet] == 0) - p0.sum()) / math.sqrt(np.sum(p0 * (1 - p0)))
    assert abs(z) < 5.0


def test_gamma_factors_make_counts_overdispersed():
    """With the default day and hour factors busy intervals have Pearson dispersion over 1.5."""
    specs = _mixed_specs(day_shape=60.0, hour_shape=150.0)
    net = generate_network(
        seed=3,
        detectors=specs,
        history_days=14,
        test_days=0,
        inject=False,
        lone_missing_fraction=0.0,
    )
    spec = specs[0]  # a freeway lane: about 50 vehicles per 5 minutes
    starts, counts = net.rows_of(spec.detector_id)
    mu = expected_rate(spec, starts)
    busy = mu >= 30
    # Expected dispersion 1 + mu ((1+1/60)(1+1/150) - 1), about 2.2 at mu = 50.
    assert np.mean((counts[busy] - mu[busy]) ** 2 / mu[busy]) > 1.5


def test_local_road_nights_have_long_runs_of_zeros(fault_free):
    """On at least 85 % of nights each rural station has 2 h or more of consecutive zeros."""
    has_run = []
    for spec in fault_free.detectors:
        if spec.road_class != "local":
            continue
        starts, counts = fault_free.rows_of(spec.detector_id)
        day, seconds = _local(starts)
        for night in np.unique(day):
            zero = counts[(day == night) & (seconds < 5 * 3600)] == 0
            longest = run = 0
            for is_zero in zero:
                run = run + 1 if is_zero else 0
                longest = max(longest, run)
            has_run.append(longest >= 8)
    # Under the model about 96 % of nights qualify; over 392 station-nights the binomial sd is
    # about 1 %, so 85 % is far below (nights of one group are correlated; still well over 3 sd).
    assert np.mean(has_run) >= 0.85


def test_thanksgiving_is_a_holiday_with_light_traffic(fault_free):
    """Thanksgiving is a sunday_holiday day and freeways carry under 80 % of the Thursday before."""
    assert day_type_of(date(2026, 11, 26)) == "sunday_holiday"
    assert day_type_of(date(2026, 11, 27)) == "weekday"
    thanksgiving = int(datetime(2026, 11, 26, tzinfo=TZ).timestamp())
    week_before = int(datetime(2026, 11, 19, tzinfo=TZ).timestamp())
    mainline = [d.detector_id for d in fault_free.detectors if d.facility == "mainline"]
    holiday = sum(
        _window(fault_free, d, thanksgiving, thanksgiving + 86400)[1].sum() for d in mainline
    )
    usual = sum(_window(fault_free, d, week_before, week_before + 86400)[1].sum() for d in mainline)
    assert holiday < 0.8 * usual


def test_us_holidays_match_the_holidays_package():
    """us_federal_holidays reproduces holidays.US (the service's calendar) for 2021-2035."""
    for year in range(2021, 2036):
        assert us_federal_holidays(year) == dict(sorted(holidays.US(years=year).items()))


# ---------------------------------------------------------------------------------------------
# Injected faults and events
# ---------------------------------------------------------------------------------------------


def _injections(network, action):
    found = [inj for inj in network.injections if inj.action == action]
    assert found, f"scenario has no {action} injection"
    return found


def test_injections_change_only_their_windows(network, fault_free):
    """Outside every injection window each detector's rows equal the fault-free network's."""
    for spec in network.detectors:
        starts, counts = network.rows_of(spec.detector_id)
        base_starts, base_counts = fault_free.rows_of(spec.detector_id)
        inside = np.zeros(starts.shape, dtype=bool)
        base_inside = np.zeros(base_starts.shape, dtype=bool)
        for inj in network.injections:
            if spec.detector_id in inj.detector_ids:
                inside |= (starts >= inj.start_s) & (starts < inj.end_s)
                base_inside |= (base_starts >= inj.start_s) & (base_starts < inj.end_s)
        np.testing.assert_array_equal(starts[~inside], base_starts[~base_inside])
        np.testing.assert_array_equal(counts[~inside], base_counts[~base_inside])


def test_stuck_detectors_report_only_zeros(network, fault_free):
    """Every 'zero' window reports rows, all zero, where fault-free traffic was counted."""
    for inj in _injections(network, "zero"):
        for detector_id in inj.detector_ids:
            starts, counts = _window(network, detector_id, inj.start_s, inj.end_s)
            interval = network.detectors[network.index_of(detector_id)].interval_s
            assert starts.size >= 0.95 * (inj.end_s - inj.start_s) / interval  # only lone gaps
            assert np.all(counts == 0), inj.id
            assert _window(fault_free, detector_id, inj.start_s, inj.end_s)[1].sum() > 50


def test_stuck_at_zero_starts_once_at_a_peak_and_once_at_night(network):
    """The test period has one stuck detector starting near its peak rate, one at night."""
    at_peak = at_night = False
    for inj in _injections(network, "zero"):
        if inj.period != "test":
            continue
        spec = network.detectors[network.index_of(inj.detector_ids[0])]
        day_starts = np.arange(inj.start_s - 43200, inj.start_s + 43200, spec.interval_s)
        rate = expected_rate(spec, day_starts)
        start_rate = expected_rate(spec, np.array([inj.start_s]))[0]
        at_peak |= start_rate >= 0.8 * rate.max()
        at_night |= datetime.fromtimestamp(inj.start_s, TZ).hour < 5
    assert at_peak and at_night


def test_lane_of_a_pair_fails_while_its_neighbors_count_normally(network, fault_free):
    """A zero window on one lane leaves the other lanes of its group untouched and busy."""
    found = False
    for inj in _injections(network, "zero"):
        if inj.period != "test" or inj.group is None or len(inj.detector_ids) != 1:
            continue
        neighbors = [
            d.detector_id
            for d in network.detectors
            if d.group == inj.group and d.detector_id not in inj.detector_ids
        ]
        overlapping = [
            other
            for other in network.injections
            if other is not inj
            and set(other.detector_ids) & set(neighbors)
            and other.start_s < inj.end_s
            and inj.start_s < other.end_s
        ]
        if len(neighbors) < 2 or overlapping:
            continue
        for detector_id in neighbors:
            starts, counts = _window(network, detector_id, inj.start_s, inj.end_s)
            base = _window(fault_free, detector_id, inj.start_s, inj.end_s)
            np.testing.assert_array_equal(counts, base[1])
            assert counts.sum() > 0
        found = True
    assert found


def test_chattering_multiplies_counts_by_two_to_three(network, fault_free):
    """Chattering windows carry 2-3 times the fault-free counts."""
    for inj in _injections(network, "scale_range"):
        low, high = inj.factors
        assert 2.0 <= low < high <= 3.0
        assert inj.end_s - inj.start_s >= 4 * 3600  # for hours
        detector_id = inj.detector_ids[0]
        inflated = _window(network, detector_id, inj.start_s, inj.end_s)[1].sum()
        usual = _window(fault_free, detector_id, inj.start_s, inj.end_s)[1].sum()
        # Sums of hundreds to thousands of vehicles: the ratio sits well inside [low, high].
        assert low < inflated / usual < high, inj.id


def test_over_capacity_chatter_exceeds_the_lane_maximum(network, fault_free):
    """The over_capacity injection exceeds 250 per 5 min per lane often; fault-free never does."""
    found = [inj for inj in network.injections if inj.kind == "over_capacity"]
    assert found
    for inj in found:
        spec = network.detectors[network.index_of(inj.detector_ids[0])]
        cap = MAX_PER_5MIN_PER_LANE * spec.lanes * spec.interval_s / 300
        counts = _window(network, spec.detector_id, inj.start_s, inj.end_s)[1]
        assert np.mean(counts > cap) >= 0.25
        assert np.all(_window(fault_free, spec.detector_id, inj.start_s, inj.end_s)[1] <= cap)


def test_scaled_windows_move_counts_by_their_factor(network, fault_free):
    """Each 'scale' window's count sum equals factor x the fault-free sum within 6 sd."""
    for inj in _injections(network, "scale"):
        for detector_id, factor in zip(inj.detector_ids, inj.factors, strict=True):
            scaled = _window(network, detector_id, inj.start_s, inj.end_s)[1].sum()
            usual = _window(fault_free, detector_id, inj.start_s, inj.end_s)[1].sum()
            # Thinning (f < 1) or added Poisson vehicles (f > 1): sd of the ratio is about
            # sqrt(f |1 - f| / usual); 6 sd fails by chance with probability about 2e-9.
            sd = math.sqrt(factor * abs(1 - factor) / usual)
            assert scaled / usual == pytest.approx(factor, abs=6 * sd + 1e-9), inj.id


def test_incident_drops_several_detectors_then_the_queue_discharges(network, fault_free):
    """The incident halves or worse several detectors of one group; a discharge rise follows."""
    drops = [
        inj
        for inj in network.injections
        if inj.cause == "traffic" and inj.kind == "low_volume" and inj.period == "test"
    ]
    assert drops
    for inj in drops:
        assert len(inj.detector_ids) >= 2 and inj.group is not None
        assert 30 * 60 <= inj.end_s - inj.start_s <= 60 * 60
        for detector_id in inj.detector_ids:
            dropped = _window(network, detector_id, inj.start_s, inj.end_s)[1].sum()
            usual = _window(fault_free, detector_id, inj.start_s, inj.end_s)[1].sum()
            assert dropped < 0.5 * usual
        after = [
            o
            for o in network.injections
            if o.group == inj.group and o.start_s == inj.end_s and o.kind == "high_volume"
        ]
        assert after
        upstream = sorted(inj.detector_ids)[0]  # stations are numbered in travel order
        rise = _window(network, upstream, after[0].start_s, after[0].end_s)[1].sum()
        usual = _window(fault_free, upstream, after[0].start_s, after[0].end_s)[1].sum()
        assert rise > 1.3 * usual


def test_special_event_raises_a_whole_group_in_the_evening(network, fault_free):
    """The special event lifts every detector of its group 1.8-2.5x for 2-3 evening hours."""
    events = [
        inj
        for inj in network.injections
        if inj.cause == "traffic"
        and inj.kind == "high_volume"
        and inj.end_s - inj.start_s >= 2 * 3600
    ]
    assert events
    for inj in events:
        members = sorted(d.detector_id for d in network.detectors if d.group == inj.group)
        assert sorted(inj.detector_ids) == members and len(members) >= 3
        assert inj.end_s - inj.start_s <= 3 * 3600
        assert datetime.fromtimestamp(inj.start_s, TZ).hour >= 16
        raised = sum(_window(network, d, inj.start_s, inj.end_s)[1].sum() for d in members)
        usual = sum(_window(fault_free, d, inj.start_s, inj.end_s)[1].sum() for d in members)
        assert 1.8 <= raised / usual <= 2.5


def test_frozen_detector_repeats_one_nonzero_value(network):
    """A 'freeze' window repeats one nonzero count, for far more than 4 intervals (LTPP 4+)."""
    for inj in _injections(network, "freeze"):
        counts = _window(network, inj.detector_ids[0], inj.start_s, inj.end_s)[1]
        assert counts.size >= 24
        assert np.unique(counts).size == 1 and counts[0] > 0, inj.id


def test_offline_windows_have_no_rows_and_rows_either_side(network):
    """An 'absent' window removes every row of its detectors; the intervals beside it report."""
    group_wide = False
    for inj in _injections(network, "absent"):
        members = {d.detector_id for d in network.detectors if d.group == inj.group}
        group_wide |= set(inj.detector_ids) == members and len(members) >= 3
        for detector_id in inj.detector_ids:
            interval = network.detectors[network.index_of(detector_id)].interval_s
            starts, _ = network.rows_of(detector_id)
            assert not np.any((starts >= inj.start_s) & (starts < inj.end_s))
            assert np.isin([inj.start_s - interval, inj.end_s], starts).all()
    assert group_wide


def test_patchy_reports_lose_many_short_bursts(network):
    """A 'patchy' day loses 20-50 % of its intervals in 10+ gaps of at most 4 intervals."""
    for inj in _injections(network, "patchy"):
        spec = network.detectors[network.index_of(inj.detector_ids[0])]
        expected = np.arange(inj.start_s, inj.end_s, spec.interval_s)
        reported = np.isin(expected, network.rows_of(spec.detector_id)[0])
        assert 0.20 <= 1 - reported.mean() <= 0.50
        edges = np.diff(np.concatenate(([1], reported.astype(int), [1])))
        gap_starts, gap_ends = np.flatnonzero(edges == -1), np.flatnonzero(edges == 1)
        assert gap_starts.size >= 10
        assert np.max(gap_ends - gap_starts) <= 4


def test_scenario_has_faults_in_both_periods(network):
    """History holds a whole stuck day and a chatter afternoon; test holds every fault type."""
    history = [inj for inj in network.injections if inj.period == "history"]
    test = [inj for inj in network.injections if inj.period == "test"]
    assert any(i.action == "zero" and i.end_s - i.start_s >= 86400 for i in history)
    assert any(i.action == "scale_range" for i in history)
    assert {"zero", "scale_range", "freeze", "absent", "patchy", "scale"} <= {
        i.action for i in test
    }
    assert set(simulate.ALERT_KINDS) <= {i.kind for i in network.injections}
    for inj in history:
        assert network.history_start_s <= inj.start_s and inj.end_s <= network.test_start_s
    for inj in test:
        assert network.test_start_s <= inj.start_s and inj.end_s <= network.end_s


def test_lone_missing_intervals_are_rare_and_isolated(network):
    """Outside injections 0.3-1 % of intervals are missing, never two in a row."""
    missing = expected_total = 0
    for spec in network.detectors:
        grid = np.arange(network.history_start_s, network.end_s, spec.interval_s)
        touched = np.zeros(grid.shape, dtype=bool)
        for inj in network.injections:
            if spec.detector_id in inj.detector_ids:
                touched |= (grid >= inj.start_s - spec.interval_s) & (
                    grid < inj.end_s + spec.interval_s
                )
        lost = ~np.isin(grid, network.rows_of(spec.detector_id)[0]) & ~touched
        assert not np.any(lost[1:] & lost[:-1]), spec.detector_id
        missing += lost.sum()
        expected_total += (~touched).sum()
    assert 0.003 <= missing / expected_total <= 0.01


# ---------------------------------------------------------------------------------------------
# Determinism, time zones and files
# ---------------------------------------------------------------------------------------------


def test_same_seed_gives_identical_arrays_and_another_seed_does_not():
    """generate_network is a pure function of its arguments."""
    specs = _mixed_specs(day_shape=60.0, hour_shape=150.0)
    first, second, other = (
        generate_network(seed=s, detectors=specs, history_days=7, test_days=2) for s in (7, 7, 8)
    )
    for name in ("detector_index", "start_s", "count"):
        np.testing.assert_array_equal(getattr(first, name), getattr(second, name))
    assert not np.array_equal(first.count[: other.count.size], other.count[: first.count.size])


def test_write_feed_twice_gives_byte_identical_files(tmp_path):
    """Two writes of one network give identical sha256 and a gzip header with mtime 0."""
    net = generate_network(
        seed=7,
        detectors=_mixed_specs(day_shape=60.0, hour_shape=150.0),
        history_days=3,
        test_days=1,
    )
    one = write_feed(net, tmp_path / "one")
    two = write_feed(net, tmp_path / "two")
    for name in simulate.FEED_FILES:
        assert _sha256(tmp_path / "one" / name) == _sha256(tmp_path / "two" / name)
        assert one["files"][name]["sha256"] == two["files"][name]["sha256"]
    header = (tmp_path / "one" / "counts.csv.gz").read_bytes()[:10]
    assert header[4:8] == b"\x00\x00\x00\x00"  # RFC 1952 MTIME field


def test_fall_back_day_has_25_hours_of_intervals(network):
    """On 2026-11-01 the local day holds 25 hours of 1-, 5- and 15-minute intervals."""
    day_start = int(datetime(2026, 11, 1, tzinfo=TZ).timestamp())
    day_end = int(datetime(2026, 11, 2, tzinfo=TZ).timestamp())
    assert day_end - day_start == 25 * 3600
    for interval_s in (60, 300, 900):
        rows = np.isin(
            network.detector_index,
            [i for i, d in enumerate(network.detectors) if d.interval_s == interval_s],
        )
        starts = network.start_s[rows]
        on_day = np.unique(starts[(starts >= day_start) & (starts < day_end)])
        assert np.all((on_day - day_start) % interval_s == 0)
        if interval_s == 60:
            # A single 1-minute detector: its lone gaps (about 0.5 %) stay, yet it still
            # reports more intervals than a 24-hour day can hold.
            assert 24 * 60 < on_day.size <= 25 * 60
        else:
            # Many detectors share these grids, so together they report every interval.
            assert on_day.size == 25 * 3600 // interval_s


def test_fall_back_timestamps_carry_both_offsets(feed):
    """The repeated 01:30 local appears once with -05:00 and once with -06:00 per detector."""
    folder, _ = feed
    seen: dict[str, set[str]] = {}
    for detector_id, start, _ in read_counts_csv(folder / "counts.csv.gz"):
        if start.startswith("2026-11-01T01:30:00"):
            seen.setdefault(detector_id, set()).add(start)
    assert set().union(*seen.values()) == {"2026-11-01T01:30:00-05:00", "2026-11-01T01:30:00-06:00"}
    assert sum(len(v) == 2 for v in seen.values()) >= 50


def test_spring_forward_day_has_23_hours_of_intervals():
    """On 2027-03-14 (US DST start) a 5-minute detector reports 276 intervals."""
    net = generate_network(
        seed=1,
        detectors=[_spec("x")],
        history_start=date(2027, 3, 12),
        history_days=4,
        test_days=0,
        lone_missing_fraction=0.0,
    )
    day, _ = _local(net.start_s)
    spring = (date(2027, 3, 14) - date(1970, 1, 1)).days
    assert np.sum(day == spring) == 23 * 12


def test_no_duplicate_rows_and_rows_sorted_by_start_then_detector(network):
    """Each (detector, start) appears once and rows are ordered by start then detector_id."""
    key = network.start_s * 1000 + network.detector_index
    assert np.all(np.diff(key) > 0)
    ids = [d.detector_id for d in network.detectors]
    assert ids == sorted(ids)


def test_counts_csv_round_trips_to_the_network_arrays(network, feed):
    """Reading counts.csv.gz back gives the network's detector, start and count arrays."""
    folder, report = feed
    index, start, count = read_counts_arrays(
        folder / "counts.csv.gz", [d.detector_id for d in network.detectors]
    )
    np.testing.assert_array_equal(index, network.detector_index)
    np.testing.assert_array_equal(start, network.start_s)
    np.testing.assert_array_equal(count, network.count)
    assert report["rows"] == count.size


def test_read_counts_csv_tolerates_formatting_and_rejects_bad_counts(tmp_path):
    """BOM, CRLF, blank lines, spaces, reordered columns and 12.0 are read; 1.5 is refused."""
    path = tmp_path / "counts.csv"
    path.write_bytes(
        "\ufeffstart, count ,detector_id\r\n\r\n"
        " 2026-10-05T00:00:00-05:00 ,12.0, a1 \r\n2026-10-05T00:05:00-05:00,0,a1\r\n".encode()
    )
    assert list(read_counts_csv(path)) == [
        ("a1", "2026-10-05T00:00:00-05:00", 12),
        ("a1", "2026-10-05T00:05:00-05:00", 0),
    ]
    gz = tmp_path / "counts.csv.gz"
    gz.write_bytes(gzip.compress(b"detector_id,start,count\na1,2026-10-05T00:00:00-05:00,1.5\n"))
    with pytest.raises(ValueError, match="line 2"):
        list(read_counts_csv(gz))


def test_feed_files_follow_the_published_formats(network, feed):
    """GeoJSON, truth.json and the CSV header follow the documented layout and size limits."""
    folder, report = feed
    geo = json.loads((folder / "detectors.geojson").read_text())
    assert geo["type"] == "FeatureCollection" and 48 <= len(geo["features"]) <= 64
    keys = {
        "detector_id",
        "label",
        "group",
        "road_class",
        "lanes",
        "interval_s",
        "timezone",
        "holiday_calendar",
    }
    for feature in geo["features"]:
        assert feature["type"] == "Feature" and set(feature["properties"]) == keys
        lon, lat = feature["geometry"]["coordinates"]
        assert feature["geometry"]["type"] == "Point" and -180 <= lon <= 180 and -90 <= lat <= 90
        assert feature["properties"]["road_class"] in simulate.ROAD_CLASSES
    sizes: dict[str | None, int] = {}
    for feature in geo["features"]:
        sizes[feature["properties"]["group"]] = sizes.get(feature["properties"]["group"], 0) + 1
    assert 1 <= sizes.pop(None, 0) <= 2 and min(sizes.values()) >= 3

    truth = json.loads((folder / "truth.json").read_text())
    assert truth["timezone"] == "America/Chicago" and truth["seed"] == simulate.DEFAULT_SEED
    assert truth["history"] == {
        "start": "2026-10-05T00:00:00-05:00",
        "end": "2026-11-16T00:00:00-06:00",
    }
    assert truth["test"] == {
        "start": "2026-11-16T00:00:00-06:00",
        "end": "2026-11-30T00:00:00-06:00",
    }
    for item, inj in zip(truth["injections"], network.injections, strict=True):
        assert simulate.parse_rfc3339(item["start"]) == inj.start_s
        assert simulate.parse_rfc3339(item["end"]) == inj.end_s
        assert item["detector_ids"] == list(inj.detector_ids) and item["kind"] == inj.kind

    with gzip.open(folder / "counts.csv.gz", "rt") as text:
        assert text.readline() == "detector_id,start,count\n"
        assert text.readline().startswith("bra3-eb-lt,2026-10-05T00:00:00-05:00,")
    assert report["rows"] <= 1_100_000
    assert sum(f["bytes"] for f in report["files"].values()) < 15_000_000


def test_committed_seed_feed_matches_a_fresh_regeneration(feed):
    """seed_feed/ is byte-identical to `python -m service.tools.simulate --out seed_feed` output."""
    folder, _ = feed
    for name in simulate.FEED_FILES:
        assert _sha256(SEED_FEED / name) == _sha256(folder / name), name


def test_seed_feed_readme_lists_every_injection(network):
    """seed_feed/README.md documents the regeneration command and every injection id."""
    readme = (SEED_FEED / "README.md").read_text()
    assert "python -m service.tools.simulate --out seed_feed --seed 20261116" in readme
    for inj in network.injections:
        assert f"| {inj.id} |" in readme
