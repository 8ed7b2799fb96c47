"""Alert episodes from flagged intervals and their likely cause: pure, no database.

The summary sentences have their own table-driven specification in test_sentences.py."""

from __future__ import annotations

from dataclasses import dataclass

import pytest

from service.stats.episodes import (
    NO_REPORTS_REOPEN_S,
    Episode,
    cause_for,
    communications_runs,
    episodes_from_rows,
)

STEP = 300  # five-minute intervals
T0 = 1_767_225_600  # 2026-01-01T00:00:00Z, a Thursday
DET = "det-1"


@dataclass(frozen=True)
class Flag:
    detector_id: str
    kind: str
    start_s: int
    log_p: float = -5.0
    observed: float | None = 0.0
    expected: float | None = 10.0


def flags(kind: str, indexes: list[int], *, detector_id: str = DET, **values: float) -> list[Flag]:
    return [Flag(detector_id, kind, T0 + i * STEP, **values) for i in indexes]


def episodes(rows: list[Flag], *, scored_through: int = 1000, close_after: int = 3
             ) -> list[Episode]:
    return episodes_from_rows(DET, rows, interval_s=STEP, scored_end_s=T0 + scored_through * STEP,
                              close_after=close_after)


def test_gap_shorter_than_close_after_keeps_one_episode() -> None:
    """Two unflagged intervals between flags, with close_after 3, do not split the episode."""
    (ep,) = episodes(flags("low_volume", [0, 1, 4, 5]))
    assert (ep.start_s, ep.end_s, ep.n_intervals) == (T0, T0 + 5 * STEP, 4)


def test_gap_of_close_after_intervals_splits_episodes() -> None:
    """Three unflagged intervals with close_after 3 end the first episode; the next flag opens
    a second one."""
    first, second = episodes(flags("low_volume", [0, 1, 5]))
    assert (first.start_s, first.end_s, first.status) == (T0, T0 + STEP, "closed")
    assert first.closed_s == T0 + (1 + 3) * STEP
    assert second.start_s == second.end_s == T0 + 5 * STEP


def test_episode_stays_open_until_close_after_intervals_are_scored() -> None:
    """Closed only once close_after unflagged intervals after its last flag have been scored."""
    rows = flags("zero_counts", [10, 11])
    (still_open,) = episodes(rows, scored_through=11 + 3)
    (closed,) = episodes(rows, scored_through=11 + 4)
    assert still_open.status == "open" and still_open.closed_s is None
    assert closed.status == "closed" and closed.closed_s == T0 + (11 + 3) * STEP


def test_episode_sums_counts_and_keeps_strongest_log_p() -> None:
    """Observed and expected add up over the episode's intervals; log_p is the smallest."""
    rows = [Flag(DET, "high_volume", T0, log_p=-4.0, observed=30.0, expected=10.0),
            Flag(DET, "high_volume", T0 + STEP, log_p=-9.0, observed=40.0, expected=12.0)]
    (ep,) = episodes(rows)
    assert (ep.observed, ep.expected, ep.log_p) == (70.0, 22.0, -9.0)
    assert ep.subject == ep.detector_id == DET and ep.kind == "high_volume"


def test_kinds_form_separate_episodes() -> None:
    """Flags of different kinds on the same intervals are episodes of their own."""
    got = episodes(flags("zero_counts", [0, 1]) + flags("repeated_value", [0, 1]))
    assert sorted(ep.kind for ep in got) == ["repeated_value", "zero_counts"]


def test_missing_data_closes_as_soon_as_data_returns() -> None:
    """A no_reports episode closes one interval after its last missing interval, not close_after."""
    (ep,) = episodes(flags("no_reports", [0, 1], observed=None), scored_through=3)
    assert ep.status == "closed" and ep.closed_s == T0 + 2 * STEP and ep.observed is None


def test_patchy_reporting_within_reopen_window_is_one_episode() -> None:
    """Gaps less than NO_REPORTS_REOPEN_S apart reopen the same missing-data episode."""
    within = NO_REPORTS_REOPEN_S // STEP - 1  # unflagged intervals between the two gaps
    (ep,) = episodes(flags("no_reports", [0, within + 1], observed=None))
    assert ep.n_intervals == 2 and ep.end_s == T0 + (within + 1) * STEP


def test_missing_data_gaps_further_apart_are_two_episodes() -> None:
    """Gaps NO_REPORTS_REOPEN_S or more apart are separate missing-data episodes."""
    apart = NO_REPORTS_REOPEN_S // STEP  # unflagged intervals between the two gaps
    assert len(episodes(flags("no_reports", [0, apart + 1], observed=None))) == 2


def test_rows_out_of_order_give_the_same_episodes() -> None:
    """Row order within a kind does not matter."""
    rows = flags("low_volume", [0, 1, 2, 9, 10])
    assert episodes(rows[::-1]) == episodes(rows)


@pytest.mark.parametrize(("kind", "neighbors", "cause"), [
    ("no_reports", {}, "communications"),
    ("low_volume", None, "unknown"),
    ("low_volume", {"n1": {"zero_counts"}}, "traffic"),
    ("zero_counts", {"n1": {"high_volume"}}, "detector"),
    ("high_volume", {"n1": {"over_capacity"}}, "traffic"),
    ("high_volume", {}, "detector"),
    ("over_capacity", {"n1": {"high_volume"}}, "detector"),
    ("repeated_value", {"n1": {"repeated_value"}}, "communications"),
    ("repeated_value", {"n1": {"low_volume"}}, "detector"),
])
def test_cause_follows_what_the_neighbors_show(kind: str, neighbors: dict[str, set[str]] | None,
                                                cause: str) -> None:
    """Same-direction deviation on a neighbor means traffic, normal neighbors a detector
    fault, missing data or values frozen together communications, no neighbors unknown."""
    others = [] if neighbors is None else ["n1", "n2"]
    assert cause_for(kind, others=others, neighbor_kinds=neighbors or {}) == cause


def test_communications_runs_need_most_of_the_group_missing_together() -> None:
    """Two of three members missing together form a run; one alone does not; a gap of more
    than one interval ends the run."""
    rows = (flags("no_reports", [0, 1, 2, 6], detector_id="a", observed=None)
            + flags("no_reports", [0, 1, 6], detector_id="b", observed=None)
            + flags("no_reports", [5], detector_id="c", observed=None))
    runs = communications_runs(rows, n_members=3, step=STEP)
    assert [(r[0], r[1], r[2]) for r in runs] == [(T0, T0 + STEP, ["a", "b"]),
                                                  (T0 + 6 * STEP, T0 + 6 * STEP, ["a", "b"])]
    assert runs[0][3] == 40.0 and runs[0][4] == -5.0
