"""Shifts most of a group shows at once: found from the members' alerts, caused by traffic."""

from __future__ import annotations

from types import SimpleNamespace

from service.stats.episodes import cause_for, shared_shifts

STEP = 300
DAY = 86_400


def alert(det: str, kind: str, start_h: float, end_h: float) -> SimpleNamespace:
    return SimpleNamespace(detector_id=det, kind=kind, start_s=int(start_h * 3600),
                           end_s=int(end_h * 3600))


def whole_days(t: int) -> tuple[int, int]:
    return t - t % DAY, t - t % DAY + DAY


def test_two_of_three_members_low_together_make_one_shift() -> None:
    """Two of three members alerting low at overlapping times are one low shift spanning both
    alerts; the third member's high alert is not part of it."""
    rows = [alert("a", "low_volume", 7.0, 8.0), alert("b", "zero_counts", 7.5, 9.0),
            alert("c", "high_volume", 7.0, 8.0)]
    shifts = shared_shifts(rows, n_members=3, step=STEP)
    assert len(shifts) == 1
    sh = shifts[0]
    assert sh.direction == "low_volume" and sh.detectors == ("a", "b")
    assert (sh.start_s, sh.end_s) == (7 * 3600, 9 * 3600)
    assert sh.covers(rows[0]) and sh.covers(rows[1]) and not sh.covers(rows[2])


def test_one_member_alone_is_no_shift() -> None:
    """A single member's alerts, or members alerting at different times, are no shift."""
    rows = [alert("a", "low_volume", 7.0, 8.0), alert("b", "low_volume", 12.0, 13.0)]
    assert shared_shifts(rows, n_members=3, step=STEP) == []


def test_a_day_long_shift_takes_in_the_days_volume_alerts_but_not_lone_zero_runs() -> None:
    """With local days, the same direction's runs on one day are one event, and a member's
    later low_volume alert that day belongs to it; a lone run of zeros does not."""
    rows = [alert("a", "low_volume", 1.0, 2.0), alert("b", "low_volume", 1.5, 2.5),
            alert("a", "low_volume", 20.0, 21.0), alert("b", "low_volume", 20.5, 21.5),
            alert("c", "low_volume", 12.0, 12.5), alert("c", "zero_counts", 15.0, 16.0)]
    shifts = shared_shifts(rows, n_members=3, step=STEP, day_bounds=whole_days)
    assert len(shifts) == 1
    sh = shifts[0]
    assert (sh.start_s, sh.end_s) == (3600, int(21.5 * 3600))
    assert sh.covers(rows[4]) and not sh.covers(rows[5])
    assert len(shared_shifts(rows, n_members=3, step=STEP)) == 2  # without days: two events


def test_alerts_inside_a_shared_shift_are_traffic_never_a_detector() -> None:
    """A member's volume alert inside a shared shift is caused by traffic, even when no
    neighbor was flagged in its own few intervals; a frozen value is judged as before."""
    assert cause_for("low_volume", others=["b"], neighbor_kinds={},
                     in_shared_shift=True) == "traffic"
    assert cause_for("low_volume", others=["b"], neighbor_kinds={}) == "detector"
    assert cause_for("repeated_value", others=["b"], neighbor_kinds={},
                     in_shared_shift=True) == "detector"
