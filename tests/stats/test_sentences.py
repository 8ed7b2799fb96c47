"""The one-sentence alert summaries an operator reads on a phone: every kind x cause rendered.

Rules (each checked for every combination): the place is named (the detector's label, or for a
group the site its members share); the start is written with weekday, day and month name in the
detector's local time ("Tue 17 Nov 17:10"), never as "11-17" that reads as a range; the length is
stated; what was seen is set against what was expected; a repeated value states the value and
how many intervals; an over-capacity alert states the cap; a likely cause is named only where the
evidence gives one (never "cause unknown" beside a guess); one clause separator, no dashes
between clauses; under 200 characters with the demo's longest labels.
"""

from __future__ import annotations

import re

import pytest

from service.domain import CAUSES, KINDS
from service.stats.episodes import Episode, cause_phrase, common_site, summary_sentence

STEP = 300
T0 = 1_794_935_400  # 2026-11-17T17:10:00Z; Tue 17 Nov 11:10 in America/Chicago
TZ = "America/Chicago"
LABEL = "Brannock Ave & Third St, SB approach, through lane 1"  # the demo's longest label form
STAMP = re.compile(r"(Mon|Tue|Wed|Thu|Fri|Sat|Sun) \d{1,2} (Jan|Feb|Mar|Apr|May|Jun|Jul|Aug|Sep|"
                   r"Oct|Nov|Dec) \d\d:\d\d")
OBSERVED = {"zero_counts": 0.0, "low_volume": 61.0, "high_volume": 915.0,
            "over_capacity": 4_100.0, "repeated_value": 12.0 * 37, "no_reports": None}


def _episode(kind: str, *, closed: bool, n: int = 37, hours: float = 3.0) -> Episode:
    end = T0 + int(hours * 3600) - STEP
    return Episode(subject="bra3-sb-t1", detector_id="bra3-sb-t1", kind=kind, start_s=T0,
                   end_s=end, closed_s=end + STEP if closed else None, n_intervals=n,
                   observed=OBSERVED[kind], expected=240.0, log_p=-40.0)


@pytest.mark.parametrize("closed", [False, True])
@pytest.mark.parametrize("cause", CAUSES)
@pytest.mark.parametrize("kind", KINDS)
def test_every_kind_and_cause_reads_by_the_rules(kind: str, cause: str, closed: bool) -> None:
    """Each kind x cause x open/closed sentence follows every rule in the module docstring."""
    ep = _episode(kind, closed=closed, n=36)
    text = summary_sentence(ep, cause, interval_s=STEP, timezone=TZ, label=LABEL,
                            cap_per_interval=250.0)
    assert text.startswith(f"{LABEL}: "), text
    assert "Tue 17 Nov 11:10" in text, text                     # local time, unambiguous
    assert not re.search(r"\b\d\d-\d\d\b", text), text          # no "11-17"
    assert "for 3 h" in text, text                               # how long
    assert len(text) < 200, (len(text), text)
    assert "—" not in text and " - " not in text, text           # no dashes between clauses
    assert "unknown" not in text and "cause" not in text, text   # no self-contradiction
    assert text.count(";") <= 1 and text.endswith("."), text
    if closed:
        assert "since" not in text and "–14:10" in text, text    # the end, same day: time only
    else:
        assert "since Tue 17 Nov 11:10" in text, text
    phrase = cause_phrase(kind, cause)
    if phrase is not None:
        assert text.endswith(f"; {phrase}."), text
    if kind == "repeated_value":
        assert "the same count, 12, 36 times in a row" in text, text
    if kind == "over_capacity":
        assert "max 250 per 5 min" in text, text
    if kind in ("zero_counts", "low_volume", "high_volume"):
        assert "240" in text and "expected" in text, text


def test_unknown_cause_names_no_cause_except_the_two_a_frozen_value_can_have() -> None:
    """With no neighbors to compare, a sentence states the facts and no cause; a repeated value
    names both of its possible causes."""
    for kind in KINDS:
        text = summary_sentence(_episode(kind, closed=False), "unknown", interval_s=STEP,
                                timezone=TZ, label=LABEL)
        if kind == "repeated_value":
            assert text.endswith("; likely a stuck detector card or frozen controller."), text
        elif kind != "no_reports":
            assert ";" not in text and "likely" not in text, text


def test_cause_phrases_say_what_the_likely_fault_is() -> None:
    """The phrases the trade uses: a dead loop or detector card; a traffic event seen on the
    other lanes; a controller or communications loss."""
    assert cause_phrase("zero_counts", "detector") == "likely a dead loop or detector card"
    assert cause_phrase("low_volume", "traffic") == \
        "likely a traffic event: other lanes here drop too"
    assert cause_phrase("high_volume", "traffic") == \
        "likely a traffic event: other lanes here rise too"
    assert cause_phrase("no_reports", "communications") == \
        "likely a controller or communications loss"
    assert cause_phrase("low_volume", "unknown") is None


def test_patchy_reporting_says_how_many_intervals_arrived() -> None:
    """Gaps with reports between them read as what happened, not as a label."""
    ep = Episode(subject="d", detector_id="d", kind="no_reports", start_s=T0,
                 end_s=T0 + 47 * STEP, closed_s=None, n_intervals=17, observed=None,
                 expected=0.0, log_p=-9.0)
    text = summary_sentence(ep, "communications", interval_s=STEP, timezone=TZ, label="Elm St NB")
    assert text == ("Elm St NB: reported 31 of 48 intervals for 4 h since Tue 17 Nov 11:10; "
                    "likely a communications fault.")


def test_an_episode_across_midnight_names_both_days() -> None:
    """A closed episode ending on another local day gives that day too."""
    ep = _episode("zero_counts", closed=True, hours=20.0)
    text = summary_sentence(ep, "detector", interval_s=STEP, timezone=TZ, label="Elm St NB")
    assert "for 20 h, Tue 17 Nov 11:10–Wed 18 Nov 07:10" in text, text


def test_group_outage_names_the_members_common_site_and_how_many_of_them() -> None:
    """A group's communications alert names the place its members share, not the group code,
    and how many of its detectors went silent."""
    labels = ["Brannock Ave & Third St, EB approach, left-turn lane",
              "Brannock Ave & Third St, EB approach, through lane 1",
              "Brannock Ave & Third St, EB approach, right-turn lane"]
    site = common_site(labels)
    assert site == "Brannock Ave & Third St, EB approach"
    ep = Episode(subject="group:bra3-eb", detector_id=None, kind="no_reports", start_s=T0,
                 end_s=T0 + 11 * STEP, closed_s=None, n_intervals=12, observed=None,
                 expected=0.0, log_p=-12.0)
    text = summary_sentence(ep, "communications", interval_s=STEP, timezone=TZ, group="bra3-eb",
                            members=["a", "b", "c"], group_size=4, site=site)
    assert text == ("Brannock Ave & Third St, EB approach: no reports from 3 of 4 detectors for "
                    "1 h since Tue 17 Nov 11:10; likely a controller or communications loss.")


def test_a_group_without_shared_site_falls_back_to_its_code() -> None:
    """Members whose labels share nothing (or have none) leave the group's code as the place."""
    assert common_site(["Elm St NB", "Oak Ave SB"]) is None
    assert common_site([None, "Oak Ave SB"]) is None
    ep = Episode(subject="group:g1", detector_id=None, kind="no_reports", start_s=T0,
                 end_s=T0 + 3 * STEP, closed_s=None, n_intervals=4, observed=None,
                 expected=0.0, log_p=-8.0)
    text = summary_sentence(ep, "communications", interval_s=STEP, timezone=TZ, group="g1",
                            members=["a", "b"], group_size=5)
    assert text.startswith("group g1: no reports from 2 of 5 detectors for 20 min since ")


@pytest.mark.parametrize(("kind", "observed", "share", "way"),
                         [("low_volume", 480.0, "40%", "drop"), ("high_volume", 1800.0, "150%", "rise")])
def test_group_traffic_shift_reads_as_one_event(kind: str, observed: float, share: str,
                                                 way: str) -> None:
    """A shift most of a group shows together (an unlisted holiday, weather) is one traffic
    event for the place, with the members' total against their expected total."""
    ep = Episode(subject="group:bra3-eb", detector_id=None, kind=kind, start_s=T0,
                 end_s=T0 + 23 * STEP, closed_s=T0 + 24 * STEP, n_intervals=24,
                 observed=observed, expected=1200.0, log_p=-12.0)
    text = summary_sentence(ep, "traffic", interval_s=STEP, timezone=TZ, group="bra3-eb",
                            members=["a", "b", "c"], group_size=3,
                            site="Brannock Ave & Third St, EB approach")
    assert text == (f"Brannock Ave & Third St, EB approach: 3 of 3 detectors counted "
                    f"{observed:,.0f} vehicles for 2 h, Tue 17 Nov 11:10–13:10, {share} of the "
                    f"1,200 expected; likely a traffic event: most detectors here {way} "
                    "together.")
