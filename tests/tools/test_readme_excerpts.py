"""docs/update_readme.py rebuilds the README's demo excerpts from a demo's printed output."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
spec = importlib.util.spec_from_file_location("update_readme", ROOT / "docs" / "update_readme.py")
assert spec and spec.loader
update_readme = importlib.util.module_from_spec(spec)
spec.loader.exec_module(update_readme)

OUTPUT = """
Alerts an operator would see (3):
id  detector  kind         cause     status  start (local)     hours  score  summary
 3  a         zero_counts  detector  closed  Tue 17 Nov 17:10   17.8  80.65  A: counted 0
 4  b         zero_counts  detector  closed  Tue 17 Nov 18:10    1.8  10.65  B: counted 0
 5  c         low_volume   traffic   closed  Wed 18 Nov 08:00    0.8  12.13  C: counted 6

Detection against the demo's injected truth (test period):
truth  kind  detectors
T01    zero_counts  a

recall  by kind
100%    zero_counts=1/1

demo finished in 60 s
"""


def test_excerpt_keeps_one_alert_per_kind_and_the_whole_detection_table() -> None:
    """The alert excerpt shows the first alert of each kind; the detection table is whole."""
    excerpt = update_readme.alert_excerpt(OUTPUT)
    assert " 3  a" in excerpt and " 5  c" in excerpt and " 4  b" not in excerpt
    assert excerpt.endswith("...")
    table = update_readme.detection_table(OUTPUT)
    assert table.startswith("Detection against") and table.endswith("100%    zero_counts=1/1")
    assert "demo finished" not in table


def test_replacing_needs_the_markers_and_keeps_the_rest() -> None:
    """Text outside the markers is kept; a README without markers is refused."""
    readme = "intro\n<!-- demo-alerts:begin -->\nold\n<!-- demo-alerts:end -->\noutro\n"
    new = update_readme.replace_between(readme, "demo-alerts", "fresh")
    assert new == "intro\n<!-- demo-alerts:begin -->\n```\nfresh\n```\n<!-- demo-alerts:end -->\noutro\n"
    with pytest.raises(SystemExit):
        update_readme.replace_between("no markers", "demo-alerts", "x")


def test_the_readme_has_both_marker_pairs() -> None:
    text = (ROOT / "README.md").read_text()
    for name in ("demo-alerts", "demo-detection"):
        assert f"<!-- {name}:begin -->" in text and f"<!-- {name}:end -->" in text
