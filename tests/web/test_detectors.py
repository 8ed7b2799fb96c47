"""The detector registry: create, update, list, GeoJSON import, and clear refusals."""

from __future__ import annotations

import gzip

import orjson
import pytest

from tests.conftest import auth
from tests.factories import count_items, detector_payload


def test_put_detector_creates_then_updates(client, keys) -> None:
    """PUT creates (201) and then updates (200) the same detector."""
    h = auth(keys["admin"])
    r = client.put("/v1/detectors/ELM-NB-1", json=detector_payload(), headers=h)
    assert r.status_code == 201, r.text
    assert r.json()["location"] == {"type": "Point", "coordinates": [-97.51, 35.21]}
    r = client.put("/v1/detectors/ELM-NB-1", json=detector_payload(lanes=3), headers=h)
    assert r.status_code == 200 and r.json()["lanes"] == 3
    listed = client.get("/v1/detectors", headers=auth(keys["read"])).json()
    assert listed["count"] == 1 and listed["data"][0]["group"] == "G-ELM-NB"


@pytest.mark.parametrize(("change", "field"), [
    ({"interval_s": 301}, "interval_s"),
    ({"interval_s": 7200}, "interval_s"),
    ({"lanes": 0}, "lanes"),
    ({"timezone": "Mars/Olympus"}, "timezone"),
    ({"road_class": "highway"}, "road_class"),
    ({"holiday_calendar": "XX"}, "holiday_calendar"),
    ({"location": {"type": "Point", "coordinates": [200, 10]}}, "location"),
    ({"color": "red"}, "color"),
])
def test_put_detector_rejects_bad_fields(client, keys, change, field) -> None:
    """Bad registry fields get 422 naming the field."""
    r = client.put("/v1/detectors/X1", json=detector_payload(**change), headers=auth(keys["admin"]))
    assert r.status_code == 422, r.text
    assert field in r.json()["message"]


def test_put_detector_interval_locked_once_counts_exist(client, keys) -> None:
    """The interval cannot change under stored counts."""
    h = auth(keys["admin"])
    client.put("/v1/detectors/D1", json=detector_payload(), headers=h)
    client.post("/v1/counts", json={"counts": count_items("D1", n=2)}, headers=h)
    r = client.put("/v1/detectors/D1", json=detector_payload(interval_s=900), headers=h)
    assert r.status_code == 422 and "cannot change" in r.json()["message"]


def test_get_unknown_detector_is_404(client, keys) -> None:
    """An unknown detector id is a 404 with its name."""
    r = client.get("/v1/detectors/NOPE", headers=auth(keys["read"]))
    assert r.status_code == 404 and "NOPE" in r.json()["message"]


def test_import_feature_collection_stores_valid_features_and_lists_bad(client, keys) -> None:
    """A GeoJSON import stores good features and names each bad one by index."""
    good = {"type": "Feature", "geometry": {"type": "Point", "coordinates": [-97.5, 35.2]},
            "properties": {"detector_id": "A1", **{k: v for k, v in detector_payload().items()
                                                   if k != "location"}}}
    bad = {"type": "Feature", "geometry": None,
           "properties": {"detector_id": "A2", "interval_s": 7, "timezone": "UTC"}}
    doc = {"type": "FeatureCollection", "features": [good, bad, dict(good)]}
    r = client.post("/v1/detectors:import", json=doc, headers=auth(keys["admin"]))
    assert r.status_code == 422, r.text
    body = r.json()
    assert body["created"] == 1 and "2 rejected" in body["message"]
    assert [e["index"] for e in body["errors"]] == [1, 2]
    assert "interval_s" in body["errors"][0]["error"]
    assert "twice" in body["errors"][1]["error"]


def test_import_rejects_document_that_is_not_a_feature_collection(client, keys) -> None:
    """A non-FeatureCollection document is a 400 naming RFC 7946."""
    r = client.post("/v1/detectors:import", json={"type": "Feature"}, headers=auth(keys["admin"]))
    assert r.status_code == 400 and "FeatureCollection" in r.json()["message"]


@pytest.mark.parametrize("field", ["label", "group", "timezone", "holiday_calendar"])
@pytest.mark.parametrize("char", ["\x00", "\n", "\x7f", "\u2028"])
def test_put_detector_rejects_control_characters_naming_field(client, keys, field, char) -> None:
    """A NUL or other control character in a text field is a 422 naming the field, never a 500."""
    value = {"label": "Elm", "group": "elm-nb", "timezone": "UTC", "holiday_calendar": "US"}[field]
    body = detector_payload(**{field: value[:1] + char + value[1:]})
    r = client.put("/v1/detectors/X1", json=body, headers=auth(keys["admin"]))
    assert r.status_code == 422, r.text
    assert r.json()["message"].startswith(f"{field}: ")
    assert f"U+{ord(char):04X}" in r.json()["message"]
    assert client.get("/v1/detectors/X1", headers=auth(keys["read"])).status_code == 404


def test_put_detector_rejects_nul_in_path_id(client, keys) -> None:
    """A NUL in the detector id of the path is a 422, never a 500."""
    r = client.put("/v1/detectors/D%001", json=detector_payload(), headers=auth(keys["admin"]))
    assert r.status_code == 422, r.text


def feature(detector_id, **props):  # type: ignore[no-untyped-def]
    body = {k: v for k, v in detector_payload().items() if k != "location"}
    body.update(props)
    return {"type": "Feature", "geometry": {"type": "Point", "coordinates": [-97.5, 35.2]},
            "properties": {"detector_id": detector_id, **body}}


@pytest.mark.parametrize(("bad", "message"), [
    (feature("B\x001"), "U+0000"),
    (feature("B1\n"), "U+000A"),
    (feature("B1", label="Elm\x00Ave"), "label: "),
    (feature("B1", group="elm\tnb"), "group: "),
    (feature("B1", timezone="UTC\x00"), "timezone: "),
    (feature(["B1"]), "detector_id is a JSON list"),
    ({"type": "Feature", "id": "B1\x00", "geometry": None,
      "properties": {"interval_s": 300, "timezone": "UTC"}}, "U+0000"),
])
def test_import_bad_feature_is_listed_and_good_ones_stored(client, keys, bad, message) -> None:
    """One feature the database could not hold is a 422 naming its index; the others are stored."""
    doc = {"type": "FeatureCollection", "features": [feature("A1"), bad, feature("A2")]}
    r = client.post("/v1/detectors:import", json=doc, headers=auth(keys["admin"]))
    assert r.status_code == 422, r.text
    body = r.json()
    assert body["created"] == 2 and [e["index"] for e in body["errors"]] == [1]
    assert message in body["errors"][0]["error"]
    listed = client.get("/v1/detectors", headers=auth(keys["read"])).json()
    assert [d["detector_id"] for d in listed["data"]] == ["A1", "A2"]


def test_import_all_valid_is_200(client, keys) -> None:
    """An import with no bad feature answers 200 with what was created and updated."""
    doc = {"type": "FeatureCollection", "features": [feature("A1"), feature("A2")]}
    h = auth(keys["admin"])
    r = client.post("/v1/detectors:import", json=doc, headers=h)
    assert r.status_code == 200 and (r.json()["created"], r.json()["errors"]) == (2, [])
    r = client.post("/v1/detectors:import", json=doc, headers=h)
    assert r.status_code == 200 and r.json()["updated"] == 2


def test_import_gzip_body_is_415(client, keys) -> None:
    """A gzip-compressed detector file is refused as gzip, not as bad JSON."""
    doc = {"type": "FeatureCollection", "features": [feature("A1")]}
    r = client.post("/v1/detectors:import", content=gzip.compress(orjson.dumps(doc)),
                    headers={**auth(keys["admin"]), "content-type": "application/geo+json"})
    assert r.status_code == 415 and "gzip is not accepted" in r.json()["message"]


@pytest.mark.parametrize("param", ["group", "after"])
def test_list_detectors_rejects_nul_in_query(client, keys, param) -> None:
    """A NUL in a list filter is a 422 naming the parameter, never a 500."""
    r = client.get("/v1/detectors", params={param: "g\x001"}, headers=auth(keys["read"]))
    assert r.status_code == 422, r.text
    message = r.json()["message"]
    assert param in message and "control character U+0000" in message
