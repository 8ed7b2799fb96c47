"""Text that would reach the database is checked first: NUL and control characters in
detector list filters and detector labels are a clear 422 on both databases."""

from __future__ import annotations

import pytest

from tests.conftest import auth
from tests.factories import detector_payload


@pytest.mark.parametrize("name", ["group", "after"])
@pytest.mark.parametrize("value", ["G\x00", "G\r\n", "G\x9b"])
def test_detector_list_filters_with_control_characters_are_422(client, keys, name, value) -> None:
    """The list's group filter and cursor refuse control characters with a 422 naming them."""
    r = client.get("/v1/detectors", params={name: value}, headers=auth(keys["read"]))
    assert r.status_code == 422, r.text
    assert name in r.json()["message"] and "control character" in r.json()["message"]


@pytest.mark.parametrize("field", ["label", "group"])
def test_put_detector_with_nul_in_label_or_group_is_422(client, keys, field) -> None:
    """A detector's label or group holding NUL is refused; nothing is stored."""
    r = client.put("/v1/detectors/D1", json=detector_payload(**{field: "Elm\x00Ave"}),
                   headers=auth(keys["admin"]))
    assert r.status_code == 422 and field in r.json()["message"]
    assert client.get("/v1/detectors/D1", headers=auth(keys["read"])).status_code == 404


def test_detector_label_may_hold_unicode_text(client, keys) -> None:
    """Labels are plain text in any script; only control characters are refused."""
    label = "Straße Nord — Ausfahrt 3"
    r = client.put("/v1/detectors/D1", json=detector_payload(label=label),
                   headers=auth(keys["admin"]))
    assert r.status_code == 201 and r.json()["label"] == label
