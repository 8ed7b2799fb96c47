"""Planners' figures (service.stats.figures): AASHTO AADT, peak-hour factor, K30, D, and the
honesty of the imputation behind their intervals."""

from __future__ import annotations

import numpy as np
import pytest

from service.stats import figures as fg

# ---------------------------------------------------------------------------------------------
# A simulated year with known truth (self-consistency: the imputation is given the true
# time-of-day shape; what is checked is how it fills gaps and how honest its intervals are).
# ---------------------------------------------------------------------------------------------

INTERVAL_S = 300
BINS = 86400 // INTERVAL_S
FIRST_DAY = 19358  # 2023-01-01 as days since 1970-01-01 (a Sunday)
N_DAYS = 365
DAY_ALPHA = 0.01
INTERVAL_ALPHA = 0.03


def _shape(peak_am: float, peak_pm: float) -> np.ndarray:
    hours = (np.arange(BINS) + 0.5) * INTERVAL_S / 3600
    curve = (0.15 + peak_am * np.exp(-0.5 * ((hours - 7.75) / 1.0) ** 2)
             + peak_pm * np.exp(-0.5 * ((hours - 17.25) / 1.3) ** 2)
             + 0.6 * np.exp(-0.5 * ((hours - 12.5) / 3.0) ** 2))
    return curve / curve.sum()


def simulate_year(rng: np.random.Generator, *, daily: float = 12_000.0,
                  shape: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """5-minute counts of one year: a seasonal level, weekday/weekend shapes, gamma day
    factors (DAY_ALPHA) and negative binomial intervals (INTERVAL_ALPHA)."""
    days = FIRST_DAY + np.arange(N_DAYS)
    month, dow = fg.calendar_of_days(days)
    season = 1.0 + 0.12 * np.sin(2 * np.pi * (np.arange(N_DAYS) - 100) / 365)
    weekday = dow < 5
    day_type = np.where(weekday, 0, np.where(dow == 5, 1, 2))
    shapes = np.stack([_shape(1.2, 1.5) if shape is None else shape, _shape(0.2, 0.3),
                       _shape(0.1, 0.2)])
    scale = np.array([1.0, 0.75, 0.6])
    mu_day = daily * scale[day_type]  # the baseline: no season (the level carries it)
    mu = (mu_day[:, None] * shapes[day_type]).reshape(-1)
    g = rng.gamma(1 / DAY_ALPHA, DAY_ALPHA, N_DAYS) * season
    lam = mu * np.repeat(g, BINS)
    h = rng.gamma(1 / INTERVAL_ALPHA, INTERVAL_ALPHA, lam.size)
    counts = rng.poisson(lam * h)
    day = np.repeat(np.arange(N_DAYS), BINS)
    return {"count": counts, "mu": mu, "day": day, "month": month, "dow": dow,
            "hour_key": day * 24 + np.tile(np.arange(BINS) * INTERVAL_S // 3600, N_DAYS),
            "quarter": np.tile(np.arange(BINS) * INTERVAL_S // 900, N_DAYS)}


def blank(rng: np.random.Generator, n: int, *, share: float) -> np.ndarray:
    """Usable mask with ``share`` of intervals lost: half as random intervals, half as whole
    days."""
    usable = rng.random(n) >= share / 2
    lost_days = rng.choice(N_DAYS, size=int(round(N_DAYS * share / 2)), replace=False)
    usable.reshape(N_DAYS, BINS)[lost_days] = False
    return usable


def hourly(sim: dict[str, np.ndarray], usable: np.ndarray) -> fg.HourlyClean:
    n = sim["count"].size
    clean = fg.clean_intervals(sim["count"], usable, mu=sim["mu"],
                               interval_alpha=np.full(n, INTERVAL_ALPHA),
                               day_alpha=np.full(n, DAY_ALPHA), day=sim["day"])
    return fg.hourly_clean(clean, hour_key=sim["hour_key"], month=sim["month"],
                           day_of_week=sim["dow"])


def true_figures(sim: dict[str, np.ndarray]) -> dict[str, float]:
    hours = np.add.reduceat(sim["count"].astype(float), np.arange(0, sim["count"].size, 12))
    daily = hours.reshape(N_DAYS, 24).sum(axis=1)
    aadt = float(fg.aashto_aadt(daily, month=sim["month"], day_of_week=sim["dow"]).aadt)
    return {"aadt": aadt, "hv30": float(fg.kth_highest(hours)), "hours": hours}


# ---------------------------------------------------------------------------------------------
# AADT
# ---------------------------------------------------------------------------------------------


@pytest.mark.unit
def test_aashto_aadt_matches_hand_computation_on_a_small_table():
    """AASHTO AADT (FHWA TMG): the average of monthly averages of day-of-week averages.
    Hand computation (not a published example): January's Mondays 1000 and 1200 average 1100,
    Tuesday 900, the other five days 1000 -> MADT 7000/7 = 1000; February 700 on six days and
    1400 on Saturday -> 5600/7 = 800; AADT over the two months = 900, while the plain average
    of the 15 days is 13700/15 = 913.3 (it over-weights January's extra Monday)."""
    jan = [(1, 0, 1000), (1, 0, 1200), (1, 1, 900)] + [(1, w, 1000) for w in range(2, 7)]
    feb = [(2, w, 700) for w in range(7) if w != 5] + [(2, 5, 1400)]
    month, dow, vol = (np.array(c) for c in zip(*(jan + feb), strict=True))
    res = fg.aashto_aadt(vol, month=month, day_of_week=dow)
    assert float(res.aadt) == pytest.approx(900.0)
    assert res.madt[0] == pytest.approx(1000.0) and res.madt[1] == pytest.approx(800.0)
    assert res.madw[0, 0] == pytest.approx(1100.0)
    assert res.days[0, 0] == 2 and res.days[5].sum() == 0
    assert np.isnan(res.madt[2:]).all()
    assert vol.mean() == pytest.approx(913.333, abs=1e-3)


@pytest.mark.unit
def test_aashto_aadt_agrees_with_plain_adt_on_a_full_year():
    """On a year with every day counted the two differ only through unequal month lengths and
    the 4 or 5 of each weekday in a month (second-order effects): agree within 1 % (the
    tolerance this implies for a +-12 % season and a weekday/weekend ratio of 1.6; computed,
    not from the Guide)."""
    sim = simulate_year(np.random.default_rng(1))
    truth = true_figures(sim)
    daily = truth["hours"].reshape(N_DAYS, 24).sum(axis=1)
    assert truth["aadt"] == pytest.approx(daily.mean(), rel=0.01)
    assert truth["aadt"] != daily.mean()  # the methods do differ


@pytest.mark.unit
def test_aashto_aadt_rejects_bad_months():
    """Months are 1..12 and days of week 0..6; anything else is an error, not a silent drop."""
    with pytest.raises(ValueError, match="month must be"):
        fg.aashto_aadt([1.0], month=[13], day_of_week=[0])


# ---------------------------------------------------------------------------------------------
# Peak-hour factor
# ---------------------------------------------------------------------------------------------


@pytest.mark.unit
def test_peak_hour_factor_follows_hcm_definition_on_hand_table():
    """HCM: PHF = V / (4 x V15max). Hand computation: quarters 100, 120, 150, 130 -> V = 500,
    V15 = 150, PHF = 500 / 600 = 0.8333; equal quarters give the upper bound 1.0, all traffic
    in one quarter the lower bound 0.25; an empty hour is undefined (NaN)."""
    phf = fg.peak_hour_factor([[100, 120, 150, 130], [50, 50, 50, 50], [0, 80, 0, 0],
                               [0, 0, 0, 0]])
    assert phf[:3] == pytest.approx([500 / 600, 1.0, 0.25])
    assert np.isnan(phf[3])


@pytest.mark.unit
def test_peak_hour_factor_stays_within_its_bounds():
    """Whatever the observed quarters, 0.25 <= PHF <= 1.0 (HCM)."""
    q = np.random.default_rng(2).integers(0, 400, size=(5000, 4))
    phf = fg.peak_hour_factor(q)
    phf = phf[~np.isnan(phf)]
    assert phf.min() >= 0.25 and phf.max() <= 1.0


@pytest.mark.unit
def test_peak_hour_factor_rejects_other_shapes_and_negative_volumes():
    """Four quarters, non-negative: otherwise a clear error."""
    with pytest.raises(ValueError, match="four 15-minute"):
        fg.peak_hour_factor([1, 2, 3])
    with pytest.raises(ValueError, match=">= 0"):
        fg.peak_hour_factor([1, 2, -3, 4])


@pytest.mark.unit
def test_peak_hours_find_am_and_pm_peaks_from_observed_quarters():
    """Hand-made days: an AM hour 07:30-08:30 with quarters 100, 160, 120, 120 (PHF 500/640 =
    0.78125, hand computation) and a PM hour 17:00-18:00 of 150 each (PHF 1.0); an incomplete
    quarter (NaN) keeps that day out of its hour."""
    base = np.full((5, 96), 20.0)
    base[:, 30:34] = [100, 160, 120, 120]
    base[:, 68:72] = 150
    base[4, 31] = np.nan
    out = fg.peak_hours(base, day_type=np.zeros(5, int), day_types=("weekday",))
    am, pm = out["weekday"]["am"], out["weekday"]["pm"]
    assert am["start"] == "07:30" and am["phf"] == pytest.approx(0.78125) and am["days"] == 4
    assert pm["start"] == "17:00" and pm["phf"] == pytest.approx(1.0) and pm["days"] == 5
    assert am["phf_low"] <= am["phf"] <= am["phf_high"]


# ---------------------------------------------------------------------------------------------
# K30 and D
# ---------------------------------------------------------------------------------------------


@pytest.mark.unit
def test_kth_highest_is_the_30th_highest_hour():
    """The design hour is the 30th highest hourly volume (common practice)."""
    hours = np.arange(1.0, 101.0)[::-1].copy()
    np.random.default_rng(3).shuffle(hours)
    assert fg.kth_highest(hours) == 71.0


@pytest.mark.unit
def test_directional_distribution_is_the_peak_share_of_the_top_hours():
    """Hand computation: over the two highest two-way hours (k=2) direction a carries
    60 + 70 of 100 + 100 -> D = 0.65, a is the peak direction."""
    d, a_peak = fg.directional_distribution([60, 70, 10], [40, 30, 5], k=2)
    assert float(d) == pytest.approx(0.65) and bool(a_peak)


# ---------------------------------------------------------------------------------------------
# Imputation honesty on simulated years with known truth
# ---------------------------------------------------------------------------------------------


@pytest.mark.unit
@pytest.mark.slow
@pytest.mark.parametrize("share", [0.10, 0.30])
def test_imputed_aadt_interval_covers_the_truth_at_about_its_rate(share):
    """Blank ``share`` of the intervals (half at random, half as whole days) in 40 simulated
    years: the 95 % interval of the imputed AADT holds the complete year's AADT in at least
    34 of 40 (a calibrated interval misses 7 or more with probability ~0.3 %), and is not
    wider than needed (mean half-width under 2 % of AADT)."""
    rng = np.random.default_rng(11 if share < 0.2 else 12)
    hits, widths = 0, []
    for _ in range(40):
        sim = simulate_year(rng)
        truth = true_figures(sim)
        res = fg.annual_figures([hourly(sim, blank(rng, sim["count"].size, share=share))],
                                draws=200, seed=int(rng.integers(1 << 30)))
        a = res["aadt"]
        hits += a["low"] <= truth["aadt"] <= a["high"]
        widths.append((a["high"] - a["low"]) / 2 / truth["aadt"])
        assert res["imputed_share"] == pytest.approx(share, abs=0.03)
    assert hits >= 34, f"covered {hits}/40"
    assert np.mean(widths) < 0.02


@pytest.mark.unit
@pytest.mark.slow
def test_k30_and_d_stay_close_to_the_truth_with_30_percent_blanked():
    """With 30 % of intervals blanked, K30 is within 5 % and D within 3 % of the complete
    year's (seeded; the misses seen over seeds 0..9 were under half of that)."""
    rng = np.random.default_rng(21)
    a = simulate_year(rng, shape=_shape(1.6, 0.8))
    b = simulate_year(rng, daily=10_000.0, shape=_shape(0.6, 1.8))
    ta, tb = true_figures(a), true_figures(b)
    ha = hourly(a, blank(rng, a["count"].size, share=0.3))
    hb = hourly(b, blank(rng, b["count"].size, share=0.3))
    res = fg.annual_figures([ha], seed=1)
    k30_true = ta["hv30"] / ta["aadt"]
    assert res["k30"]["value"] == pytest.approx(k30_true, rel=0.05)
    d_true, _ = fg.directional_distribution(ta["hours"], tb["hours"])
    dres = fg.directional_figures([ha], [hb], seed=2)
    assert dres["d"]["value"] == pytest.approx(float(d_true), rel=0.03)
    group = fg.annual_figures([ha, hb], seed=3)  # a group: the sum of its members
    assert group["aadt"]["value"] == pytest.approx(ta["aadt"] + tb["aadt"], rel=0.02)


@pytest.mark.unit
def test_whole_missing_days_follow_the_season_of_their_neighbors():
    """A blanked week in the seasonal high is imputed at its neighbors' level, not the
    year's: its imputed daily total is within 6 % of the truth (day factors vary ~10 %)."""
    rng = np.random.default_rng(31)
    sim = simulate_year(rng)
    usable = np.ones(sim["count"].size, bool)
    usable.reshape(N_DAYS, BINS)[190:197] = False
    h = hourly(sim, usable)
    point = fg.daily_totals(h.point(), h.day, N_DAYS)[190:197].sum()
    truth = sim["count"].reshape(N_DAYS, BINS)[190:197].sum()
    assert point == pytest.approx(truth, rel=0.06)
