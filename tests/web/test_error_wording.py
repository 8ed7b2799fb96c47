"""Errors say what was wrong and what to do: the forbidden action and the roles that may do it,
the detector-id rule in plain words, and the partial-batch advice the README gives."""

from __future__ import annotations

from service.domain import DETECTOR_ID_RULE, roles_granting
from tests.conftest import auth


def test_forbidden_names_the_action_and_the_roles_that_may_do_it(client, keys) -> None:
    """A read key asking to fit baselines is told which roles may, not that 'read may not'."""
    r = client.post("/v1/baselines/fit", json={}, headers=auth(keys["operate"]))
    assert r.status_code == 403
    assert r.json()["message"] == ("key 'operate-key' has the 'operate' role; to register "
                                   "detectors and fit baselines use a key with the admin role")


def test_roles_granting_follow_the_grants_table() -> None:
    """Acknowledging needs operate or admin; sending counts, ingest or admin."""
    assert roles_granting("operate") == ("operate", "admin")
    assert roles_granting("ingest") == ("ingest", "admin")
    assert roles_granting("read") == ("read", "operate", "admin")


def test_detector_id_rule_lists_the_characters_plainly(client, keys) -> None:
    """The id rule names each allowed punctuation mark: no list that makes a comma look allowed."""
    assert ", ," not in DETECTOR_ID_RULE and "- ," not in DETECTOR_ID_RULE
    assert "a period (.), an underscore (_), a colon (:) or a hyphen (-)" in DETECTOR_ID_RULE
    r = client.put("/v1/detectors/bad,id", headers=auth(keys["admin"]),
                   json={"interval_s": 300, "timezone": "UTC", "lanes": 1,
                         "road_class": "arterial"})
    assert r.status_code == 422 and DETECTOR_ID_RULE in r.json()["message"]


def test_partial_batch_says_to_send_only_the_fixed_items(client, keys) -> None:
    """A batch with one bad item stores the rest and says to fix and send only the rejected."""
    client.put("/v1/detectors/w1", headers=auth(keys["admin"]),
               json={"interval_s": 300, "timezone": "UTC", "lanes": 1, "road_class": "arterial"})
    r = client.post("/v1/counts", headers=auth(keys["ingest"]), json={"counts": [
        {"detector_id": "w1", "start": "2026-11-02T08:00:00Z", "count": 5},
        {"detector_id": "w1", "start": "2026-11-02T08:05:00Z", "count": -1}]})
    assert r.status_code == 422
    assert r.json()["message"].endswith("all valid items were stored; fix the rejected items "
                                        "listed in errors and send only those")
