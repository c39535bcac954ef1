"""``GET /api/v1/peer/registry/shared``, attacked from the caller's side: a peer learns
only the registry facts this node shares with the peer's own node, and no other role
reads them at all.

Station A holds the seeded registry (``conftest.seed_registry``: relay-1, stations a, b
and c, link-a and link-b, pair-ac, SAEs sae-a1 and sae-c1, peer-relay bound to relay-1)
and here also pair-ab (with station B), sae-b1 (an SAE of station B) and peer-c, the
node certificate of station-c registered as a peer bound to station-c. Real databases,
both backends, the ASGI app with the test certificates.
"""

from __future__ import annotations

from typing import Any

import pytest

from conftest import Node
from helpers import snapshot
from keystrata.loopback.pki import PkiFiles, cert_pin
from keystrata.registry import provisioning
from keystrata.registry.specs import Kind, PairSpec, PrincipalSpec

ROUTE = "/api/v1/peer/registry/shared"


@pytest.fixture
def station_a(station: Node, pki: PkiFiles) -> Node:
    ctx = station.ctx
    provisioning.create(
        ctx,
        Kind.PAIRS,
        PairSpec.model_validate(
            {
                "pair_id": "pair-ab",
                "relay_id": "relay-1",
                "stations": ["station-a", "station-b"],
                "policy": {"priority": 7, "masters": ["sae-a1"]},
            }
        ),
        actor="test",
    )
    for spec in (
        {"principal_id": "sae-b1", "role": "sae", "cert_subject": "sae-b1"}
        | {"station_id": "station-b"},
        {"principal_id": "peer-c", "role": "peer", "cert_subject": "station-c"}
        | {"node_id": "station-c", "cert_sha256": cert_pin(pki.dir, "station-c")},
    ):
        provisioning.create(ctx, Kind.PRINCIPALS, PrincipalSpec.model_validate(spec), actor="test")
    return station


def _ids(answer: dict[str, Any], kind: str) -> set[str]:
    return set(answer[kind])


def test_a_peer_of_station_c_learns_nothing_about_pair_ab(station_a: Node, api) -> None:
    r = api(station_a)("station-c").get(ROUTE)
    assert r.status_code == 200, r.text
    answer = r.json()
    assert answer["node"] == "station-a"
    assert answer["peer"] == "station-c"
    assert _ids(answer, "pairs") == {"pair-ac"}
    assert _ids(answer, "nodes") == {"relay-1", "station-a", "station-c"}
    assert _ids(answer, "links") == set()  # QKD links join a relay and a station
    assert _ids(answer, "saes") == {"sae-a1", "sae-c1"}
    for secret in ("pair-ab", "station-b", "sae-b1", "link-a", "link-b"):
        assert secret not in r.text, secret


def test_the_relay_learns_its_pairs_and_its_link_only(station_a: Node, api) -> None:
    r = api(station_a)("peer-relay").get(ROUTE)
    assert r.status_code == 200, r.text
    answer = r.json()
    assert answer["peer"] == "relay-1"
    assert _ids(answer, "pairs") == {"pair-ab", "pair-ac"}
    assert _ids(answer, "links") == {"link-a"}
    assert _ids(answer, "nodes") == {"relay-1", "station-a", "station-b", "station-c"}
    assert _ids(answer, "saes") == set()  # a relay serves no SAE
    assert "link-b" not in r.text
    assert answer["pairs"]["pair-ab"]["policy"]["priority"] == 7
    assert answer["pairs"]["pair-ab"]["stations"] == ["station-a", "station-b"]
    assert answer["links"]["link-a"] == {
        "relay_id": "relay-1",
        "station_id": "station-a",
        "retired": False,
    }


def test_a_query_naming_another_node_is_ignored(station_a: Node, api) -> None:
    """The facts are those of the caller's bound node, whatever the request names."""
    for query in ("?peer=station-b", "?node_id=station-b", "?node=relay-1"):
        r = api(station_a)("station-c").get(ROUTE + query)
        assert r.status_code == 200
        assert r.json()["peer"] == "station-c"
        assert "pair-ab" not in r.text


@pytest.mark.parametrize(
    ("cert", "status"),
    [
        ("sae-a1", 403),
        ("ops-ada", 403),
        ("aud-ben", 403),
        ("mon-cal", 403),
        ("mod-link-a", 403),
        ("stranger", 401),
        (None, 401),
    ],
)
def test_other_roles_and_strangers_are_refused(
    station_a: Node, api, cert: str | None, status: int
) -> None:
    r = api(station_a)(cert).get(ROUTE)
    assert r.status_code == status
    assert "pair-a" not in r.text
    assert "station-" not in r.text


def test_a_peer_whose_principal_is_retired_is_refused(station_a: Node, api) -> None:
    provisioning.retire(station_a.ctx, Kind.PRINCIPALS, "peer-c", actor="test")
    r = api(station_a)("station-c").get(ROUTE)
    assert r.status_code == 401
    assert "pair-ac" not in r.text


def test_asking_changes_nothing(station_a: Node, api) -> None:
    before = snapshot(station_a.ctx)
    for cert in ("station-c", "peer-relay"):
        assert api(station_a)(cert).get(ROUTE).status_code == 200
    assert snapshot(station_a.ctx) == before
