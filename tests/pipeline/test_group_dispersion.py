"""Fitting a network pools each group's dispersion across its detectors: a lane with a short
history borrows its day-level dispersion from its group (``fit.fit_many`` through
``baseline.pool_group_dispersion``), on a real database."""

from __future__ import annotations

import pytest
from sqlalchemy import delete, func, select

from service.config import Settings
from service.pipeline import fit as fitting
from service.stats.calendar import DAY_TYPES
from service.store import tables
from service.store.baselines import load_baseline
from service.store.engine import read_transaction, write_transaction
from tests.factories import load_network, small_network

GROUP = ("bra3-nb-lt", "bra3-nb-t1", "bra3-nb-t2")
SHORT = "bra3-nb-t2"
DAY_S = 86_400


def _share(p, g: float) -> float:  # type: ignore[no-untyped-def]
    """Share of the way from the profile's own day-level value to the group's ``g``."""
    own = p.smoothing["day_alpha_own"]
    return (p.day_alpha - own) / (g - own) if g != own else 0.0


def _baselines(engine, results):  # type: ignore[no-untyped-def]
    with read_transaction(engine) as conn:
        return {r["detector_id"]: load_baseline(conn, r["baseline_id"]) for r in results}


@pytest.mark.slow
@pytest.mark.parametrize("workers", [1, 2])
def test_fit_many_pools_day_level_dispersion_across_the_group(database_url, engine, workers
                                                               ) -> None:
    """Three lanes of one group, two with 8 weeks of history and one whose first 5 weeks were
    never stored: every stored profile records the group's value (the same for the whole
    group), the 3-week lane's day-level dispersion moves at least a quarter of the way from
    its own estimate toward it, farther (as a share of the distance) than an 8-week lane's;
    refitted alone, the lane is pooled with its mates' stored values just the same."""
    net = small_network(GROUP, history_days=56, test_days=1, seed=4)
    load_network(engine, net, until_s=net.test_start_s)
    with write_transaction(engine) as conn:
        conn.execute(delete(tables.counts).where(
            tables.counts.c.detector_id == SHORT,
            tables.counts.c.start_s < net.test_start_s - 21 * DAY_S))
    settings = Settings(database_url=database_url)
    results = fitting.fit_many(settings, engine, as_of_s=net.test_start_s, workers=workers)
    assert all(r["status"] == "fitted" for r in results), results
    fitted = _baselines(engine, results)
    assert sum(p.days_used for p in fitted[SHORT].profiles.values()) <= 21
    for name in DAY_TYPES:
        profs = {d: fitted[d].profiles[name] for d in GROUP}
        groups = {p.smoothing["group_day_alpha"] for p in profs.values()}
        assert len(groups) == 1, groups
        g = groups.pop()
        assert _share(profs[SHORT], g) >= 0.25, (name, _share(profs[SHORT], g))
        for d in GROUP:
            if d != SHORT:
                assert _share(profs[d], g) < _share(profs[SHORT], g), (name, d)
    # refitted alone (a nightly refit), the lane pools with its mates' stored own values:
    # the same result as when the group was fitted together
    alone = fitting.fit_one(engine, SHORT, as_of_s=net.test_start_s, settings=settings)
    base = _baselines(engine, [alone])[SHORT]
    for name in DAY_TYPES:
        for key in ("day_alpha", "interval_alpha"):
            assert getattr(base.profiles[name], key) == pytest.approx(
                getattr(fitted[SHORT].profiles[name], key), rel=1e-12)


def test_a_very_large_group_is_fitted_in_pieces_so_every_process_has_work(engine) -> None:
    """Detectors of one group are fitted together, but a group bigger than MAX_GROUP_UNIT
    (a whole corridor under one code) is cut into pieces, so that fit_many's processes share
    it; detectors of no group are units of one."""
    from service.tools.networks import make_detector

    size = fitting.MAX_GROUP_UNIT
    big = [f"C{i:03d}" for i in range(2 * size + 5)]
    for det in big:
        make_detector(engine, det, group="G-CORRIDOR")
    make_detector(engine, "LONE1", group=None)
    units = fitting._group_units(engine, big + ["LONE1"])
    assert [len(u) for u in units] == [size, size, 5, 1]
    assert [d for u in units[:3] for d in u] == big and units[3] == ["LONE1"]


@pytest.mark.slow
def test_a_detector_named_twice_is_fitted_once(database_url, engine) -> None:
    """``fit_many`` given the same detector twice fits and stores it once: one result, one
    baseline row."""
    net = small_network(GROUP[:1], history_days=14, test_days=1, seed=5)
    load_network(engine, net, until_s=net.test_start_s)
    settings = Settings(database_url=database_url)
    results = fitting.fit_many(settings, engine, detector_ids=[GROUP[0], GROUP[0]],
                               as_of_s=net.test_start_s, workers=1)
    assert [r["detector_id"] for r in results] == [GROUP[0]]
    with read_transaction(engine) as conn:
        stored = conn.execute(select(func.count()).select_from(tables.baselines).where(
            tables.baselines.c.detector_id == GROUP[0])).scalar_one()
    assert stored == 1
