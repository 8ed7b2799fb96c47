"""Late data that withdraws an alert and later supports it again: scoring never wedges, and
the alerts end as they would have with the data in time order."""

from __future__ import annotations

import itertools
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given
from hypothesis import settings as hyp_settings
from hypothesis import strategies as st
from sqlalchemy import Engine, select, text

from service.config import Settings
from service.pipeline import score
from service.store import scoring as store_scoring
from service.store import tables
from tests.factories import small_network
from tests.pipeline.test_score import HOUR, period_rows, post, prepared, visible_alerts

DETECTOR = "bra3-nb-t1"
WINDOW = 80  # intervals of 5 minutes: 04:00 to 10:40 local on the first test day


@pytest.fixture(scope="module")
def network():  # type: ignore[no-untyped-def]
    return small_network((DETECTOR,), history_days=21, test_days=2, seed=3)


def window_rows(net) -> list[list[Any]]:  # type: ignore[no-untyped-def]
    """80 intervals from 04:00 local; from 07:00 to 08:30 the detector counts about half the
    traffic (a drop that the CUSUM test sees sooner or later depending on what came before)."""
    lo = net.test_start_s + 7 * HOUR
    hi = lo + 90 * 60
    rng = np.random.default_rng(1)

    def edit(r):  # type: ignore[no-untyped-def]
        return [r[0], r[1], int(rng.binomial(r[2], 0.5))] if lo <= r[1] < hi else r

    start = net.test_start_s + 4 * HOUR
    return [r for r in period_rows(net, edit=edit) if r[1] >= start][:WINDOW]


class Fitted:
    """The detector's history stored and fitted once; ``reset`` returns the database to that
    state (no test-period counts, evidence or alerts) so that one test can feed many orders."""

    def __init__(self, engine: Engine, settings: Settings, net) -> None:  # type: ignore[no-untyped-def]
        self.engine, self.settings, self.test_start_s = engine, settings, net.test_start_s
        prepared(engine, settings, net)
        with engine.connect() as conn:
            self.state = [dict(r._mapping) for r in conn.execute(select(tables.detector_state))]

    def reset(self) -> None:
        s = tables.detector_state
        with self.engine.begin() as conn:
            for table in ("alerts", "evidence", "count_conflicts"):
                conn.execute(text(f"DELETE FROM {table}"))
            conn.execute(text("DELETE FROM counts WHERE start_s >= :t"), {"t": self.test_start_s})
            conn.execute(text("UPDATE counters SET value = 0"))
            for row in self.state:
                conn.execute(s.update().where(s.c.detector_id == row["detector_id"]).values(**row))

    def feed(self, batches: list[list[list[Any]]], *, score_every: int = 1
             ) -> list[dict[tuple[str, int], tuple[int, int, int]]]:
        """Post the batches, scoring after every ``score_every``-th one and at the end; returns
        what the alerts table held after each scoring: (kind, start) -> (id, seq, withdrawn)."""
        seen = []
        for i, batch in enumerate(batches):
            post(self.engine, batch)
            if (i + 1) % score_every == 0 or i == len(batches) - 1:
                score.score_until_idle(self.engine, self.settings)
                seen.append(alert_rows(self.engine))
        return seen

    def assert_drained(self) -> None:
        s = tables.detector_state
        with self.engine.connect() as conn:
            assert store_scoring.scoring_backlog(conn, self.settings) == 0
            failures = conn.execute(select(s.c.detector_id, s.c.failures, s.c.last_error)
                                    .where(s.c.failures > 0)).all()
        assert not failures, failures


def alert_rows(engine: Engine) -> dict[tuple[str, int], tuple[int, int, int]]:
    a = tables.alerts
    with engine.connect() as conn:
        return {(r.kind, r.start_s): (r.alert_id, r.seq, r.withdrawn) for r in conn.execute(
            select(a.c.kind, a.c.start_s, a.c.alert_id, a.c.seq, a.c.withdrawn))}


def revived(seen: list[dict[tuple[str, int], tuple[int, int, int]]]) -> list[tuple[str, int]]:
    """Alerts that were withdrawn after one scoring and shown again after a later one."""
    out = []
    for before, after in itertools.pairwise(seen):
        for key, (alert_id, seq, withdrawn) in before.items():
            if withdrawn and key in after and not after[key][2]:
                assert after[key][0] == alert_id, "a revived alert keeps its id"
                assert after[key][1] > seq, "a revived alert gets a new seq"
                out.append(key)
    return out


@pytest.fixture
def fitted(database_url, engine, network) -> Fitted:  # type: ignore[no-untyped-def]
    return Fitted(engine, Settings(database_url=database_url, clock="data"), network)


@pytest.fixture
def in_order(fitted, network) -> set[tuple]:  # type: ignore[no-untyped-def]
    """The alerts of the window fed in time order in one batch."""
    fitted.reset()
    fitted.feed([window_rows(network)])
    fitted.assert_drained()
    expected = visible_alerts(fitted.engine)
    assert any(a[1] == "low_volume" for a in expected), expected
    return expected


def test_four_batches_in_any_order_drain_and_revive_withdrawn_alerts(fitted, in_order,
                                                                     network) -> None:
    """Four batches of 20 counts of one detector, posted in every order with scoring after
    each: scoring always drains, an alert withdrawn by late data comes back (same id, new
    seq) when later data supports it again, and the alerts end as with in-order arrival."""
    rows = window_rows(network)
    batches = [rows[i : i + 20] for i in range(0, WINDOW, 20)]
    for order in itertools.permutations(range(4)):
        fitted.reset()
        seen = fitted.feed([batches[i] for i in order])
        fitted.assert_drained()
        assert visible_alerts(fitted.engine) == in_order, order
        revived(seen)  # checks every revival it finds keeps its id and takes a new seq
    # Whether some order withdraws and revives an alert depends on the statistics' details
    # (with the current level model none does); the revival itself is specified directly by
    # test_a_withdrawn_alert_supported_again_is_revived_with_its_id_and_a_new_seq.


@hyp_settings(max_examples=40, deadline=None, derandomize=True,
              suppress_health_check=[HealthCheck.function_scoped_fixture,
                                     HealthCheck.too_slow])
@given(data=st.data())
def test_any_batching_and_order_gives_in_order_alerts_property(fitted, in_order, network,
                                                               data) -> None:
    """Property: the window in random batches (contiguous chunks in any order, or single
    intervals shuffled), with resends, scored after every k-th batch, always drains and ends
    with the alerts of in-order arrival."""
    rows = window_rows(network)
    seed = data.draw(st.integers(0, 2**32 - 1), label="seed")
    rng = np.random.default_rng(seed)
    if data.draw(st.booleans(), label="chunks"):  # late stretches: whole chunks out of order
        size = data.draw(st.integers(5, 40), label="chunk")
        chunks = [rows[i : i + size] for i in range(0, WINDOW, size)]
        feed = [r for i in rng.permutation(len(chunks)) for r in chunks[i]]
    else:  # single late intervals
        feed = [rows[i] for i in rng.permutation(WINDOW)]
    feed += [feed[i] for i in rng.integers(0, WINDOW, data.draw(st.integers(0, 20)))]
    batch = data.draw(st.integers(5, 40), label="batch")
    every = data.draw(st.integers(1, 3), label="score every")
    fitted.reset()
    fitted.feed([feed[i : i + batch] for i in range(0, len(feed), batch)], score_every=every)
    fitted.assert_drained()
    assert visible_alerts(fitted.engine) == in_order


def test_a_withdrawn_alert_supported_again_is_revived_with_its_id_and_a_new_seq(engine) -> None:
    """An alert withdrawn by late data and then supported again is the same row: its id is
    kept, `withdrawn` is cleared and it takes a new seq, so pollers see it come back."""
    from service.store.engine import write_transaction
    from service.store.scoring import AlertWriter, alerts_from
    from tests.factories import make_detector

    make_detector(engine, "R1")
    values = {"subject": "R1", "detector_id": "R1", "group_id": None, "kind": "low_volume",
              "cause": "detector", "status": "open", "start_s": 3600, "end_s": 7200,
              "closed_s": None, "observed": 10.0, "expected": 100.0, "log_p": -12.0,
              "n_intervals": 13, "baseline_id": None, "detectors": None, "part_of": None,
              "summary": "R1: counted 10 vehicles."}
    with write_transaction(engine) as conn:
        first = AlertWriter(conn, now=1.0).upsert(None, values)
    with write_transaction(engine) as conn:
        row = alerts_from(conn, "R1", 0)[0]
        AlertWriter(conn, now=2.0).withdraw(row, "Withdrawn: later data no longer supports it.")
    with write_transaction(engine) as conn:
        withdrawn = alerts_from(conn, "R1", 0)[0]
        assert withdrawn.withdrawn and withdrawn.seq > row.seq
        again = AlertWriter(conn, now=3.0).upsert(withdrawn, values)
    with write_transaction(engine) as conn:
        back = alerts_from(conn, "R1", 0)
    assert again == first and len(back) == 1
    assert not back[0].withdrawn and back[0].seq > withdrawn.seq
