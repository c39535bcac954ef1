"""The comparison of two nodes' shared registry facts (registry/comparison.py), pure:
it names the facts that differ, never their values, never picks a side, and looks only
at the part of the peer's structure that the two nodes share."""

from __future__ import annotations

import copy
import json
from typing import Any

import pytest

from keystrata.registry import comparison
from keystrata.registry.comparison import MISSING_AT_PEER, MISSING_HERE, compare, shared_part

POLICY: dict[str, Any] = dict.fromkeys(comparison.POLICY_FIELDS) | {
    "priority": 100,
    "key_ttl_seconds": 3600,
    "max_epsilon": 1e-10,
}


def _facts(here: str, peer: str) -> dict[str, Any]:
    """What station-a and station-b share: pair-ab through relay-1, their SAEs."""
    return {
        "v": 1,
        "node": here,
        "peer": peer,
        "nodes": {
            "relay-1": {"role": "relay", "retired": False},
            "station-a": {"role": "station", "retired": False},
            "station-b": {"role": "station", "retired": False},
        },
        "links": {},
        "pairs": {
            "pair-ab": {
                "relay_id": "relay-1",
                "stations": ["station-a", "station-b"],
                "retired": False,
                "policy": dict(POLICY),
            }
        },
        "saes": {
            "sae-a1": {"station_id": "station-a", "retired": False},
            "sae-b1": {"station_id": "station-b", "retired": False},
        },
    }


@pytest.fixture
def ours() -> dict[str, Any]:
    return _facts("station-a", "station-b")


@pytest.fixture
def theirs() -> dict[str, Any]:
    return _facts("station-b", "station-a")


def test_equal_facts_agree(ours: dict[str, Any], theirs: dict[str, Any]) -> None:
    assert compare(ours, theirs) == []
    assert compare(theirs, ours) == []


def test_a_policy_field_is_named_not_its_values(
    ours: dict[str, Any], theirs: dict[str, Any]
) -> None:
    theirs["pairs"]["pair-ab"]["policy"]["masters"] = ["sae-kept-secret"]
    theirs["pairs"]["pair-ab"]["policy"]["priority"] = 987654
    found = compare(ours, theirs)
    assert found == [
        {"kind": "pair", "id": "pair-ab", "field": "policy.masters"},
        {"kind": "pair", "id": "pair-ab", "field": "policy.priority"},
    ]
    assert "sae-kept-secret" not in json.dumps(found)
    assert "987654" not in json.dumps(found)
    # The same facts from the other side: neither is taken for the truth.
    assert compare(theirs, ours) == found


def test_a_policy_field_one_side_lacks_is_named(
    ours: dict[str, Any], theirs: dict[str, Any]
) -> None:
    del theirs["pairs"]["pair-ab"]["policy"]["key_ttl_seconds"]
    assert compare(ours, theirs) == [
        {"kind": "pair", "id": "pair-ab", "field": "policy.key_ttl_seconds"}
    ]


def test_true_is_not_one(ours: dict[str, Any], theirs: dict[str, Any]) -> None:
    """JSON ``true`` and ``1`` differ, though Python's ``True == 1``."""
    theirs["saes"]["sae-a1"]["retired"] = 0
    ours["saes"]["sae-a1"]["retired"] = False
    assert compare(ours, theirs) == [{"kind": "sae", "id": "sae-a1", "field": "retired"}]


def test_entries_only_one_side_holds(ours: dict[str, Any], theirs: dict[str, Any]) -> None:
    theirs["saes"]["sae-b2"] = {"station_id": "station-b", "retired": False}
    del theirs["saes"]["sae-a1"]
    assert compare(ours, theirs) == [
        {"kind": "sae", "id": "sae-a1", "field": MISSING_AT_PEER},
        {"kind": "sae", "id": "sae-b2", "field": MISSING_HERE},
    ]


def test_a_missing_pair_is_named_once_not_with_what_it_brings(
    ours: dict[str, Any], theirs: dict[str, Any]
) -> None:
    """A pair only one side holds is that pair's finding: the SAEs and nodes it would
    make shared are not reported again as missing."""
    theirs["pairs"] = {}
    theirs["saes"] = {}
    del theirs["nodes"]["relay-1"]
    assert compare(ours, theirs) == [{"kind": "pair", "id": "pair-ab", "field": MISSING_AT_PEER}]


def test_the_peers_facts_beyond_the_shared_ones_are_ignored(
    ours: dict[str, Any], theirs: dict[str, Any]
) -> None:
    extra = copy.deepcopy(theirs)
    extra["pairs"]["pair-cd"] = {
        "relay_id": "relay-1",
        "stations": ["station-c", "station-d"],
        "retired": False,
        "policy": {},
    }
    extra["links"]["link-b"] = {"relay_id": "relay-1", "station_id": "station-b"} | {
        "retired": False
    }
    extra["saes"]["sae-c1"] = {"station_id": "station-c", "retired": False}
    extra["nodes"]["station-c"] = {"role": "station", "retired": False}
    assert shared_part(extra) == theirs
    assert compare(ours, extra) == []


@pytest.mark.parametrize(
    "change",
    [
        {"node": "station-c"},
        {"peer": "station-c"},
        {"node": "station-a", "peer": "station-b"},
        {"v": 2},
    ],
)
def test_an_answer_about_other_nodes_is_refused(
    ours: dict[str, Any], theirs: dict[str, Any], change: dict[str, Any]
) -> None:
    with pytest.raises(comparison.NotTheirs):
        compare(ours, theirs | change)


def test_links_between_the_two_only() -> None:
    relay = {
        "v": 1,
        "node": "relay-1",
        "peer": "station-a",
        "nodes": {
            "relay-1": {"role": "relay", "retired": False},
            "station-a": {"role": "station", "retired": False},
        },
        "links": {
            "link-a": {"relay_id": "relay-1", "station_id": "station-a", "retired": False},
            "link-b": {"relay_id": "relay-1", "station_id": "station-b", "retired": False},
        },
        "pairs": {},
        "saes": {"sae-a1": {"station_id": "station-a", "retired": False}},
    }
    part = shared_part(relay)
    assert set(part["links"]) == {"link-a"}
    assert part["saes"] == {}  # a relay and a station share no SAE
    assert set(part["nodes"]) == {"relay-1", "station-a"}
