"""Specifications of service.episodes: grouping evidence into episodes, closing them, naming
their cause from neighbouring detectors, and the sentence a person reads."""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
import pytest

from service.episodes import (
    CAUSES,
    KINDS,
    Episode,
    attribute_causes,
    build_episodes,
    summary_sentence,
)
from service.scoring import Thresholds, score_timeline

INTERVAL_S = 300
T0 = 1_717_200_000  # 2024-06-01 00:00 UTC, a multiple of 300 s


@dataclass
class FakeEvidence:
    """Flags and log p-values per kind, as score_timeline returns them."""

    n: int
    flag: dict = field(default_factory=dict)
    log_p: dict = field(default_factory=dict)

    def __post_init__(self):
        for kind in KINDS:
            self.flag.setdefault(kind, np.zeros(self.n, dtype=bool))
            self.log_p.setdefault(kind, np.zeros(self.n))

    def mark(self, kind, idx, log_p=-20.0):
        self.flag[kind][idx] = True
        self.log_p[kind][idx] = log_p
        return self


def build(evidence, observed, expected, close_after=3):
    return build_episodes("det-1", T0, evidence, observed=observed, expected=expected,
                          interval_s=INTERVAL_S, close_after=close_after)


def test_consecutive_flags_form_one_closed_episode_with_totals():
    """Intervals 10-14 flagged low_volume make one episode: span, totals over it, strongest
    log p, closed once close_after normal intervals follow."""
    n = 40
    ev = FakeEvidence(n).mark("low_volume", slice(10, 15), -9.0)
    ev.log_p["low_volume"][12] = -30.0
    observed = np.full(n, 50.0)
    observed[10:15] = 20.0
    expected = np.full(n, 48.0)
    (ep,) = build(ev, observed, expected)
    assert (ep.kind, ep.start_s, ep.end_s) == ("low_volume", T0 + 10 * 300, T0 + 14 * 300)
    assert ep.n_intervals == 5 and ep.observed == 100.0 and ep.expected == 240.0
    assert ep.log_p == -30.0
    assert ep.closed and ep.closed_at_s == T0 + (14 + 3 + 1) * 300


def test_short_normal_gap_does_not_split_but_a_long_one_does():
    """A 2-interval normal gap (< close_after = 3) stays inside the episode; a 3-interval gap
    closes it and the next flags open a new one."""
    n = 60
    ev = FakeEvidence(n).mark("high_volume", [5, 6, 9, 10]).mark("high_volume", [14, 15])
    eps = build(ev, np.full(n, 10.0), np.full(n, 5.0))
    assert [(e.start_s - T0) // 300 for e in eps] == [5, 14]
    assert [(e.end_s - T0) // 300 for e in eps] == [10, 15]
    assert eps[0].closed and eps[0].closed_at_s == T0 + 14 * 300


def test_episode_still_running_at_the_end_is_open():
    """Flags reaching the last intervals leave the episode open, with no close time."""
    n = 20
    ev = FakeEvidence(n).mark("over_capacity", [17, 19])
    (ep,) = build(ev, np.full(n, 900.0), np.full(n, 100.0))
    assert not ep.closed and ep.closed_at_s is None


def test_no_data_episode_starts_with_the_gap_and_closes_when_data_returns():
    """A gap of 6 missing intervals flagged from its 3rd: the episode spans the whole gap,
    expects what went uncounted, and closes as soon as a count arrives."""
    n = 30
    observed = np.full(n, 12.0)
    observed[8:14] = np.nan
    ev = FakeEvidence(n).mark("no_data", slice(10, 14), -13.8)
    (ep,) = build(ev, observed, np.full(n, 10.0), close_after=6)
    assert ep.start_s == T0 + 8 * 300 and ep.end_s == T0 + 13 * 300
    assert ep.observed == 0.0 and ep.expected == 60.0
    assert ep.closed and ep.closed_at_s == T0 + 15 * 300


def test_zero_run_episode_starts_at_the_first_zero():
    """A run of zeros flagged once improbable (its 4th zero) is reported from its first zero,
    skipping a missing interval inside the run."""
    n = 30
    observed = np.full(n, 7.0)
    observed[10:20] = 0.0
    observed[11] = np.nan
    ev = FakeEvidence(n).mark("no_counts", slice(13, 20))
    (ep,) = build(ev, observed, np.full(n, 6.0))
    assert ep.start_s == T0 + 10 * 300 and ep.n_intervals == 10
    assert ep.observed == 0.0 and ep.expected == 54.0  # 9 present intervals x 6


def test_kinds_are_separate_episodes_sorted_by_time():
    """Different kinds at once are different episodes, listed by start time."""
    n = 20
    ev = FakeEvidence(n).mark("high_volume", slice(8, 12)).mark("over_capacity", slice(5, 7))
    eps = build(ev, np.full(n, 500.0), np.full(n, 100.0))
    assert [e.kind for e in eps] == ["over_capacity", "high_volume"]


def episode(det, kind, start, end, **kw):
    base = dict(detector_id=det, kind=kind, start_s=T0 + start * 300, end_s=T0 + end * 300,
                closed=True, closed_at_s=T0 + (end + 4) * 300, observed=0.0, expected=100.0,
                log_p=-20.0, n_intervals=end - start + 1)
    base.update(kw)
    return Episode(**base)


GROUP = {"a": "g1", "b": "g1", "c": "g1", "d": "g1"}


def causes_of(episodes, groups=GROUP):
    by_det = {det: [e for e in episodes if e.detector_id == det] for det in groups}
    return attribute_causes(by_det, groups, overlap_s=600)


def test_group_dropping_together_is_traffic():
    """Three of four detectors of a group low at overlapping times: a traffic event."""
    eps = [episode("a", "low_volume", 10, 20), episode("b", "no_counts", 12, 18),
           episode("c", "low_volume", 21, 30)]  # starts within overlap_s of a's end
    got = causes_of(eps)
    assert {got[("a", "low_volume", T0 + 3000)], got[("b", "no_counts", T0 + 3600)],
            got[("c", "low_volume", T0 + 6300)]} == {"traffic"}


def test_surge_on_two_of_a_lane_pair_group_is_traffic():
    """Both detectors of a two-member group high together: traffic (2 is at least half)."""
    groups = {"a": "pair", "b": "pair"}
    eps = [episode("a", "high_volume", 10, 20), episode("b", "high_volume", 11, 19)]
    assert set(causes_of(eps, groups).values()) == {"traffic"}


def test_one_detector_low_while_neighbours_normal_is_the_detector():
    """One detector low while three neighbours report normally: the detector."""
    got = causes_of([episode("a", "no_counts", 10, 40)])
    assert got == {("a", "no_counts", T0 + 3000): "detector"}


def test_opposite_directions_are_not_a_traffic_event():
    """One detector low while another is high is not the same deviation."""
    got = causes_of([episode("a", "low_volume", 10, 40), episode("b", "high_volume", 10, 40)])
    assert got[("a", "low_volume", T0 + 3000)] == "detector"


def test_group_silent_together_is_communications():
    """no_data on three of four detectors at once: communications loss."""
    eps = [episode(d, "no_data", 10, 30) for d in "abc"]
    assert set(causes_of(eps).values()) == {"communications"}


def test_network_silent_is_communications_without_groups():
    """Detectors without groups all silent together: the network's communications."""
    groups = {"a": None, "b": None, "c": None}
    eps = [episode(d, "no_data", 10, 30) for d in "abc"]
    assert set(causes_of(eps, groups).values()) == {"communications"}


def test_no_group_or_too_few_neighbours_is_unknown():
    """No group, or only one other member reporting, cannot tell detector from traffic."""
    assert set(causes_of([episode("a", "low_volume", 10, 20)], {"a": None}).values()) == {
        "unknown"}
    groups = {"a": "pair", "b": "pair"}
    assert set(causes_of([episode("a", "low_volume", 10, 20)], groups).values()) == {"unknown"}
    # a neighbour that was itself silent does not count as looking normal
    eps = [episode("a", "low_volume", 10, 20), episode("b", "no_data", 0, 40),
           episode("c", "no_data", 0, 40)]
    assert causes_of(eps)[("a", "low_volume", T0 + 3000)] == "unknown"


def test_capacity_and_repeats_are_detector_faults_with_neighbours():
    """over_capacity and repeated_value are detector faults when a neighbour reports; a whole
    group repeating at once is a controller or polling fault (communications)."""
    got = causes_of([episode("a", "over_capacity", 5, 9), episode("b", "repeated_value", 5, 9)])
    assert set(got.values()) == {"detector"}
    eps = [episode(d, "repeated_value", 5, 9) for d in "abc"]
    assert set(causes_of(eps).values()) == {"communications"}


def test_every_cause_is_one_of_the_four():
    """Causes come only from CAUSES."""
    eps = [episode(d, k, 10, 20) for d in "abcd" for k in KINDS]
    assert set(causes_of(eps).values()) <= set(CAUSES)


def test_summary_sentence_reads_like_the_product_example():
    """The example from the product issue, in the detector's local time."""
    start = 1_717_247_100  # 2024-06-01 13:05 UTC = 08:05 in Chicago (UTC-5 in June)
    ep = replace(episode("a", "no_counts", 0, 4, observed=0.0, expected=138.6), start_s=start,
                 end_s=start + 4 * 300)
    text = summary_sentence(ep, "detector", label="Harbour Rd NB lane 2", interval_s=300,
                            tz="America/Chicago")
    assert text == ("Harbour Rd NB lane 2: counted 0 vehicles for 25 min (08:05–08:30 local) "
                    "where about 140 were expected — likely a dead detector.")


def test_summary_sentences_cover_every_kind_and_open_episodes():
    """Each kind reads as one sentence naming its figures; open episodes say 'so far'."""
    start = 1_717_247_100
    cases = {
        "low_volume": (620.0, 1300.0, "48% of normal"),
        "high_volume": (3900.0, 1300.0, "3.0 times normal"),
        "over_capacity": (2400.0, 900.0, "more than its lanes can physically carry"),
        "repeated_value": (37.0 * 6, 200.0, "same count (37) 6 intervals in a row"),
        "no_data": (0.0, 500.0, "sent no counts"),
    }
    for kind, (obs, exp, phrase) in cases.items():
        ep = Episode("a", kind, start, start + 5 * 300, True, start + 9 * 300, obs, exp, -30.0, 6)
        text = summary_sentence(ep, "unknown", label="Det 7", interval_s=300)
        assert phrase in text and text.startswith("Det 7: ") and text.endswith(".")
        assert "UTC" in text and text.count(".") == 1 + text.count("3.0")
    ep = Episode("a", "no_data", start, start + 11 * 300, False, None, 0.0, 500.0, -30.0, 12)
    text = summary_sentence(ep, "communications", label="Det 7", interval_s=300, tz="UTC")
    assert "for 1 h so far (since 13:05 local)" in text and "communications loss" in text
    with pytest.raises(ValueError):
        summary_sentence(ep, "gremlins", label="Det 7", interval_s=300)


def test_scored_dead_detector_becomes_one_detector_episode():
    """End to end: a detector dead from 08:00 among three healthy neighbours gives one
    no_counts episode starting at 08:00, attributed to the detector."""
    rng = np.random.default_rng(11)
    n = 288  # one day of 5-min intervals starting at midnight UTC
    hours = (np.arange(n) + 0.5) / 12
    mu = 2.0 + 60.0 * np.exp(-0.5 * ((hours - 9.0) / 3.0) ** 2)
    th = Thresholds.from_budget(0.05, interval_s=INTERVAL_S, mu_week=np.tile(mu, 7))
    episodes = {}
    for det in "abcd":
        y = rng.poisson(mu).astype(float)
        if det == "a":
            y[96:] = 0
        ev = score_timeline(T0, y, np.ones(n, bool), mu, 0.0, 0.0, 0.0, interval_s=INTERVAL_S,
                            cap=10**6, thresholds=th, local_day=np.zeros(n, dtype=int))
        episodes[det] = build_episodes(det, T0, ev, observed=y, expected=ev.expected,
                                       interval_s=INTERVAL_S, close_after=3)
    assert [e.kind for e in episodes["a"]] == ["no_counts"]
    assert episodes["a"][0].start_s == T0 + 96 * 300 and not episodes["a"][0].closed
    assert not any(episodes[d] for d in "bcd")
    causes = attribute_causes(episodes, GROUP, overlap_s=600)
    assert causes == {("a", "no_counts", T0 + 96 * 300): "detector"}
