"""Role x binding matrix: for every route whose caller is bound to something (a QKD
module to its link, an SAE to its station, a peer to its node), the right role bound to
the wrong thing is refused, and the right role bound to the right thing is not (a
control, so the refusals are not refusals of everything).

The matrix is built from ``route_table()``: a new route needs a row here, or a place in
``UNBOUND`` with the reason its callers are bound to nothing. Real databases, both
backends, the ASGI app with the test certificates of conftest.
"""

from __future__ import annotations

import base64
import json
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

import pytest
from sqlalchemy import select

from conftest import Node
from keystrata.api.app import route_table
from keystrata.loopback.pki import PkiFiles, cert_pin
from keystrata.peering import outbox
from keystrata.registry import provisioning
from keystrata.registry.specs import Kind, PrincipalSpec
from keystrata.storage.models import LedgerEntry


@dataclass(frozen=True)
class Case:
    """One request by a caller of the route's role bound to the wrong thing (``refused``
    with ``status``) and the same request by the rightly bound caller (``allowed``)."""

    path: str
    refused: str
    status: int
    allowed: str
    allowed_status: int = 200
    body: Any = None
    allowed_path: str | None = None  # the control's path, when it is another
    #: key.refused reasons of the refusal and of the control, where both answer 401.
    reasons: tuple[str, str] | None = None


#: Seeded registry at station-a (conftest.seed_registry): link-a (relay-1, station-a),
#: link-b (relay-1, station-b), pair-ac relayed by relay-1, SAEs sae-a1 (station-a) and
#: sae-c1 (station-c), peer-relay bound to relay-1; this module adds sae-c2, an SAE of
#: station-c (certificate sae-b2), and peer-c, the certificate of node station-c
#: registered as a peer bound to station-c.
BLOCKS = {
    "blocks": [
        {
            "block_id": "0b6f4f1e-5a55-4c1e-8f0a-6f3d2c1b0a99",
            "key": base64.b64encode(bytes(range(64))).decode(),
            "qber": 0.02,
            "epsilon": 1e-10,
            "produced_at": "2026-12-01T00:00:00Z",
        }
    ]
}
KEY_ID = "3f0c1e0a-8d5e-4c4f-9a41-5b2d0c1e7a10"
KEY_IDS = {"key_IDs": [{"key_ID": KEY_ID}]}
#: Get key with key IDs answers 401 to both; the ledger tells why.
WHY = ("not_an_sae_of_this_station", "unknown_key_id")
STATUS, ENC, DEC = (f"/api/v1/keys/sae-c1/{x}" for x in ("status", "enc_keys", "dec_keys"))
BINDINGS: dict[tuple[str, str], list[Case]] = {
    # A QKD module pushes only to its own link (at the relay, which has both links).
    ("POST", "/api/v1/links/{link_id}/blocks"): [
        Case("/api/v1/links/link-b/blocks", "mod-link-a", 403, "mod-link-b", 200, BLOCKS),
    ],
    # An SAE of station-c, registered at station-a, gets nothing of station-a's keys,
    # neither as master for a slave at station-a nor for one at station-c (pair-ac
    # joins the two stations); ETSI GS QKD 014 knows only 401. The control: sae-a1,
    # which may ask for sae-c1 (no key is ready: 503 for Get key; a key ID station-a
    # has not heard of: 401 for Get key with key IDs, recorded with another reason).
    ("GET", "/api/v1/keys/{slave_SAE_ID}/status"): [
        Case("/api/v1/keys/sae-a1/status", "sae-c2", 401, "sae-a1", 200, None, STATUS),
        Case("/api/v1/keys/sae-c1/status", "sae-c2", 401, "sae-a1", 200, None, STATUS),
    ],
    ("POST", "/api/v1/keys/{slave_SAE_ID}/enc_keys"): [
        Case("/api/v1/keys/sae-c1/enc_keys", "sae-c2", 401, "sae-a1", 503, {}, ENC),
    ],
    ("GET", "/api/v1/keys/{slave_SAE_ID}/enc_keys"): [
        Case("/api/v1/keys/sae-c1/enc_keys", "sae-c2", 401, "sae-a1", 503, None, ENC),
    ],
    ("POST", "/api/v1/keys/{master_SAE_ID}/dec_keys"): [
        Case("/api/v1/keys/sae-a1/dec_keys", "sae-c2", 401, "sae-a1", 401, KEY_IDS, DEC, WHY),
        Case("/api/v1/keys/sae-c1/dec_keys", "sae-c2", 401, "sae-a1", 401, KEY_IDS, DEC, WHY),
    ],
    ("GET", "/api/v1/keys/{master_SAE_ID}/dec_keys"): [
        Case(
            f"{DEC}?key_ID={KEY_ID}",
            "sae-c2",
            401,
            "sae-a1",
            401,
            None,
            f"{DEC}?key_ID={KEY_ID}",
            WHY,
        ),
    ],
    # Only the pair's relay reads a station's buffer report of that pair.
    ("GET", "/api/v1/peer/pairs/{pair_id}/buffer"): [
        Case("/api/v1/peer/pairs/pair-ac/buffer", "peer-c", 403, "peer-relay", 200),
    ],
    # Only the pair's other station reads a station's consumption points.
    ("GET", "/api/v1/peer/pairs/{pair_id}/progress"): [
        Case("/api/v1/peer/pairs/pair-ac/progress", "peer-relay", 403, "peer-c", 200),
    ],
}

#: Routes whose callers are bound to nothing narrower than the node, and why.
NODE_WIDE = "operator, auditor and monitor act on the whole node: no narrower binding"
PER_MESSAGE = (
    "bound per message kind, after the typed message is parsed: the sender is checked "
    "against the pair, segment and registry of each kind (node/dispatch.py and the "
    "peer attack suite, test_attack_peers.py)"
)
UNBOUND: dict[tuple[str, str], str] = {
    ("GET", "/api/v1/node"): "every role reads this node's identity: nothing to bind",
    ("POST", "/api/v1/peer/messages/batch"): PER_MESSAGE,
    ("GET", "/api/v1/peer/allocations"): "bound by construction: answers only messages "
    "destined to the caller's node (test_pending_allocations_are_only_the_callers)",
    ("GET", "/api/v1/peer/registry/shared"): "bound by construction: answers only the "
    "registry facts shared with the caller's node (test_registry_comparison.py)",
}


def _bound_keys() -> set[tuple[str, str]]:
    return set(BINDINGS) | set(UNBOUND)


def _route_keys() -> set[tuple[str, str]]:
    return {(m, r.path) for r in route_table() for m in r.methods}


def _roles(route: Any) -> frozenset[str]:
    roles: set[str] = set()
    for dep in route.dependant.dependencies:
        roles |= {str(r) for r in getattr(dep.call, "roles", frozenset())}
    return frozenset(roles)


def test_every_route_has_a_binding_row_or_a_reason() -> None:
    """A new route of a bound role (sae, qkd-module, peer) without a row fails here;
    routes of the node-wide roles only are listed with their reason."""
    missing = []
    for route in route_table():
        bound_roles = _roles(route) & {"sae", "qkd-module", "peer"}
        for method in route.methods:
            key = (method, route.path)
            if key in _bound_keys():
                continue
            if bound_roles:
                missing.append(key)
    assert not missing, f"routes of bound roles without a binding row: {missing}"
    stale = _bound_keys() - _route_keys()
    assert not stale, f"binding rows for routes that no longer exist: {stale}"
    assert NODE_WIDE  # the reason of every other route


@pytest.fixture
def bound_station(station: Node, pki: PkiFiles) -> Node:
    for spec in (
        {"principal_id": "peer-c", "role": "peer", "cert_subject": "station-c"}
        | {"node_id": "station-c", "cert_sha256": cert_pin(pki.dir, "station-c")},
        {"principal_id": "sae-c2", "role": "sae", "cert_subject": "sae-b2"}
        | {"station_id": "station-c"},
    ):
        provisioning.create(
            station.ctx, Kind.PRINCIPALS, PrincipalSpec.model_validate(spec), actor="test"
        )
    return station


#: Principal -> test certificate (conftest.CLIENTS, node certificates), where they differ.
CERT = {"peer-c": "station-c", "sae-c2": "sae-b2"}


def _call(api: Any, node: Node, who: str, method: str, case: Case) -> Any:
    client = api(node)(CERT.get(who, who))
    return client.request(method, case.path, json=case.body)


def _last_refusal(node: Node) -> str:
    with node.ctx.db.read() as s:
        entry = s.execute(
            select(LedgerEntry.entry)
            .where(LedgerEntry.event == "key.refused")
            .order_by(LedgerEntry.idx.desc())
        ).scalar()
    assert entry is not None
    return str(json.loads(bytes(entry))["reason"])


def _check(api: Any, node: Node, key: tuple[str, str]) -> None:
    method, _ = key
    for case in BINDINGS[key]:
        r = _call(api, node, case.refused, method, case)
        assert r.status_code == case.status, (case.refused, case.path, r.status_code, r.text)
        if case.reasons:
            assert _last_refusal(node) == case.reasons[0], case
        control = Case(case.allowed_path or case.path, "", 0, case.allowed, body=case.body)
        r = _call(api, node, case.allowed, method, control)
        assert r.status_code == case.allowed_status, (case.allowed, control.path, r.text)
        if case.reasons:
            assert _last_refusal(node) == case.reasons[1], case


LINK_ROUTES = sorted(k for k in BINDINGS if k[1].startswith("/api/v1/links/"))


@pytest.mark.parametrize(
    "key", sorted(set(BINDINGS) - set(LINK_ROUTES)), ids=lambda k: f"{k[0]} {k[1]}"
)
def test_the_right_role_bound_to_the_wrong_thing_is_refused(
    key: tuple[str, str], bound_station: Node, api: Any
) -> None:
    _check(api, bound_station, key)


@pytest.mark.parametrize("key", LINK_ROUTES, ids=lambda k: f"{k[0]} {k[1]}")
def test_a_module_pushes_only_to_its_own_link(key: tuple[str, str], relay: Node, api: Any) -> None:
    """At the relay, which holds both links: link-a's module pushing to link-b."""
    _check(api, relay, key)


def test_pending_allocations_are_only_the_callers(bound_station: Node, api: Any) -> None:
    """``GET /api/v1/peer/allocations`` answers the key.allocated messages queued for the
    calling node and nothing else: relay-1 and station-c each see only their own."""
    now = datetime.now(UTC)
    with bound_station.ctx.db.write() as s:
        for destination in ("station-c", "relay-1", "station-b"):
            outbox.enqueue(
                s,
                destination=destination,
                kind="key.allocated",
                segment_id=None,
                body={"kind": "key.allocated", "for": destination},
                now=now,
            )
        outbox.enqueue(
            s,
            destination="station-c",
            kind="segment.check",
            segment_id=None,
            body={"kind": "segment.check", "for": "station-c"},
            now=now,
        )
    for cert, node in (("station-c", "station-c"), ("peer-relay", "relay-1")):
        r = api(bound_station)(cert).get("/api/v1/peer/allocations")
        assert r.status_code == 200, r.text
        assert r.json()["messages"] == [{"kind": "key.allocated", "for": node}]
