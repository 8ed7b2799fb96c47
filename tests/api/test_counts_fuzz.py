"""Property: whatever one item of a batch holds, the answer is 200, 409 or 422 (never a 500),
and the valid items around it are stored."""

from __future__ import annotations

import json

from hypothesis import HealthCheck, given
from hypothesis import settings as hyp_settings
from hypothesis import strategies as st

from tests.api.test_counts import VALID_STARTS, csv_batch, stored_over_http
from tests.conftest import auth
from tests.factories import make_detector

# Any code point, lone surrogates and controls included (JSON escapes carry them).
ANY_TEXT = st.text(st.characters(exclude_categories=()), max_size=40)
JSON_VALUE = st.one_of(
    ANY_TEXT, st.integers(-(10**40), 10**40), st.floats(allow_nan=False, allow_infinity=False), st.none(),
    st.booleans(), st.lists(st.integers(), max_size=2),
    st.sampled_from(["D1", "2026-11-16T06:05:00Z", "0001-01-01T00:00:00+01:00", "\u00b2"]))
# CSV bodies are UTF-8: no lone surrogates; no line breaks inside a field.
CSV_TEXT = st.text(st.characters(exclude_categories=("Cs",), exclude_characters="\r\n"),
                   max_size=40)
FUZZ = hyp_settings(max_examples=120, deadline=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture])


def assert_neighbours_stored(client, keys, body: bytes, content_type: str) -> None:  # type: ignore[no-untyped-def]
    r = client.post("/v1/counts", content=body,
                    headers={**auth(keys["ingest"]), "content-type": content_type})
    assert r.status_code in (200, 409, 422), r.text
    answer = r.json()
    assert answer["accepted"] + answer["duplicate"] + answer["conflict"] + answer["rejected"] == 3
    stored = dict(stored_over_http(client, keys))
    assert stored[VALID_STARTS[0]] == 7 and VALID_STARTS[1] in stored


@FUZZ
@given(det=JSON_VALUE, start=JSON_VALUE, count=JSON_VALUE)
def test_post_counts_json_any_item_never_500(client, keys, engine, det, start, count) -> None:
    """Any JSON values in one item (huge integers, lone surrogates, NUL, wrong types) cost
    that item only."""
    make_detector(engine, "D1")
    items = [{"detector_id": "D1", "start": VALID_STARTS[0], "count": 7},
             {"detector_id": det, "start": start, "count": count},
             {"detector_id": "D1", "start": VALID_STARTS[1], "count": 9}]
    assert_neighbours_stored(client, keys, json.dumps({"counts": items}).encode(),
                             "application/json")


@FUZZ
@given(fields=st.lists(CSV_TEXT, min_size=0, max_size=4))
def test_post_counts_csv_any_line_never_500(client, keys, engine, fields) -> None:
    """Any text on one CSV line (quotes, NUL, controls, non-ASCII digits) costs that line only."""
    make_detector(engine, "D1")
    line = ",".join(fields)
    if not line.strip():
        line = "x"  # a blank line is skipped, not an item
    assert_neighbours_stored(client, keys, csv_batch(line), "text/csv")
