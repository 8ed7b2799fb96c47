"""Property: whatever one item of a batch holds, the answer is 200, 409 or 422 (never a 500),
and the valid items around it are stored."""

from __future__ import annotations

import json

from hypothesis import HealthCheck, given
from hypothesis import settings as hyp_settings
from hypothesis import strategies as st

from tests.conftest import auth
from tests.factories import make_detector
from tests.web.test_counts import BAD_START, VALID_STARTS, csv_batch, json_batch, stored_over_http

# Values known to have broken ingest once, mixed with arbitrary ones so that the search
# reaches them in a few dozen examples.
DETECTOR_IDS = ["D1", "D1\x00", "D\t1", "D1\n", "D" * 200_000]
STARTS = [BAD_START, "0001-01-01T00:00:00Z", "0001-01-01T00:00:00+01:00",
          "9999-12-31T23:55:00-23:59", "\uff12\uff10\uff12\uff16-11-16T06:05:00Z",
          "2026-11-16T06:05:00." + "0" * 5000 + "Z"]
COUNTS = ["5", "\u00b2", "\uff11\uff12", "9" * 5000, "-" + "9" * 5000, "9" * 30, "2.5", "-1"]
JSON_NUMBERS = ["5", "9" * 5000, "-" + "9" * 5000, "9" * 30, "2.5", "-1", "1e400", "-0"]

# Any code point, lone surrogates and controls included (JSON escapes carry them).
ANY_TEXT = st.text(st.characters(exclude_categories=()), max_size=40)
JSON_VALUE = st.one_of(
    ANY_TEXT, st.integers(-(10**40), 10**40), st.floats(allow_nan=False, allow_infinity=False),
    st.none(), st.booleans(), st.lists(st.integers(), max_size=2))
JSON_TOKEN = JSON_VALUE.map(json.dumps)  # ensure_ascii: lone surrogates become \ud800 escapes
# CSV bodies are UTF-8: no lone surrogates; no line breaks inside a field.
CSV_TEXT = st.text(st.characters(exclude_categories=("Cs",), exclude_characters="\r\n"),
                   max_size=40)
FUZZ = hyp_settings(max_examples=150, deadline=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture,
                                           HealthCheck.too_slow])


def assert_neighbors_stored(client, keys, body: bytes, content_type: str) -> None:  # type: ignore[no-untyped-def]
    r = client.post("/v1/counts", content=body,
                    headers={**auth(keys["ingest"]), "content-type": content_type})
    assert r.status_code in (200, 409, 422), r.text
    answer = r.json()
    assert answer["accepted"] + answer["duplicate"] + answer["conflict"] + answer["rejected"] == 3
    stored = dict(stored_over_http(client, keys))
    assert stored[VALID_STARTS[0]] == 7 and VALID_STARTS[1] in stored


@FUZZ
@given(det=st.one_of(st.sampled_from(DETECTOR_IDS).map(json.dumps), JSON_TOKEN),
       start=st.one_of(st.sampled_from(STARTS).map(json.dumps), JSON_TOKEN),
       count=st.one_of(st.sampled_from(JSON_NUMBERS), st.sampled_from(COUNTS).map(json.dumps),
                       JSON_TOKEN))
def test_post_counts_json_any_item_never_500(client, keys, engine, det, start, count) -> None:
    """Any JSON values in one item (huge integers, lone surrogates, NUL, wrong types, dates
    out of range) cost that item only."""
    make_detector(engine, "D1")
    assert_neighbors_stored(client, keys, json_batch((det, start, count)), "application/json")


@FUZZ
@given(det=st.one_of(st.sampled_from(DETECTOR_IDS[:2] + DETECTOR_IDS[2:3]), CSV_TEXT),
       start=st.one_of(st.sampled_from(STARTS), CSV_TEXT),
       count=st.one_of(st.sampled_from(COUNTS), CSV_TEXT),
       extra=st.lists(CSV_TEXT, max_size=2))
def test_post_counts_csv_any_line_never_500(client, keys, engine, det, start, count,
                                            extra) -> None:
    """Any text on one CSV line (quotes, NUL, controls, non-ASCII digits, huge fields) costs
    that line only."""
    make_detector(engine, "D1")
    line = ",".join([det, start, count, *extra])
    assert_neighbors_stored(client, keys, csv_batch(line), "text/csv")
