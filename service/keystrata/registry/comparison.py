"""The registry facts two nodes share, and the comparison of two nodes' views of them.

Each node keeps the part of the network registry it needs, so two nodes hold some facts
in common, and the relay and key delivery work only while they hold them alike. For a
node ``here`` and a peer node ``peer`` the *shared facts* are, as ``here``'s rows say:

- ``pairs``: every pair both belong to (as its relay or one of its stations), retired or
  not: ``relay_id``, ``stations`` (sorted), ``retired`` and the whole ``policy`` (its
  ``masters`` and ``slaves`` sorted; null stays null, "every SAE of the two stations");
- ``links``: the QKD links between the two (one end each): ``relay_id``, ``station_id``,
  ``retired``;
- ``nodes``: the two nodes' own entries and every node a shared pair or link names:
  ``role``, ``retired``;
- ``saes``: when the two are the stations of a shared pair, every SAE bound to either of
  them: ``station_id``, ``retired``. Each station checks the other's SAEs (an allocation
  names a master of the sending station; Get key names slaves of the other station), so
  both must hold both stations' SAEs alike.

Not shared, so not compared: URLs, descriptions and physical profiles (each node's own
view, for people and for planning), certificate subjects and pins (each node pins its
own callers), peer and module principals (each node registers who may call it), times
of creation and retirement (only whether an entry is retired).

The structure is JSON (:func:`shared_facts`); :func:`compare` takes two of them, this
node's and the peer's, and returns the facts they differ on as ``{kind, id, field}``
(names, never values): ``field`` names a field (``policy.priority``), or is
:data:`MISSING_HERE` / :data:`MISSING_AT_PEER` for an entry only one side holds. It
never decides which side is right and changes nothing.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any

from sqlalchemy import and_, or_, select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.registry.specs import PairPolicy, PrincipalRole
from keystrata.storage.models import Pair, Principal, QkdLink, RegistryNode

VERSION = 1
#: ``field`` of a finding about an entry that only the peer holds.
MISSING_HERE = "missing_here"
#: ``field`` of a finding about an entry that only this node holds.
MISSING_AT_PEER = "missing_at_peer"
#: Finding kind -> the member of the structure that holds that kind, in report order.
KINDS = {"node": "nodes", "link": "links", "pair": "pairs", "sae": "saes"}
POLICY_FIELDS = tuple(PairPolicy.model_fields)

Facts = dict[str, Any]
Finding = dict[str, str]


class NotTheirs(ValueError):
    """The peer's structure is not about the two nodes compared."""


def shared_facts(ctx: NodeContext, peer: str) -> Facts:
    """The facts this node shares with node ``peer``, from this node's own rows."""
    with ctx.db.read() as s:
        return facts_in(s, ctx.node_id, peer)


def facts_in(s: Session, here: str, peer: str) -> Facts:
    """:func:`shared_facts` inside the caller's session."""
    both = (here, peer)
    pairs = s.execute(
        select(Pair).where(
            or_(Pair.relay_id == here, Pair.station_a == here, Pair.station_b == here),
            or_(Pair.relay_id == peer, Pair.station_a == peer, Pair.station_b == peer),
        )
    ).scalars()
    links = s.execute(
        select(QkdLink).where(
            or_(
                and_(QkdLink.relay_id == here, QkdLink.station_id == peer),
                and_(QkdLink.relay_id == peer, QkdLink.station_id == here),
            )
        )
    ).scalars()
    found: Facts = {
        "pairs": {p.pair_id: _pair(p) for p in pairs},
        "links": {link.link_id: _link(link) for link in links},
    }
    named = _named(found, here, peer)
    nodes = s.execute(select(RegistryNode).where(RegistryNode.node_id.in_(sorted(named))))
    found["nodes"] = {n.node_id: _node(n) for n in nodes.scalars()}
    saes = s.execute(
        select(Principal).where(
            Principal.role == PrincipalRole.SAE.value, Principal.station_id.in_(both)
        )
    ).scalars()
    found["saes"] = {p.principal_id: _sae(p) for p in saes}
    return shared_part({"v": VERSION, "node": here, "peer": peer, **found})


def _pair(row: Pair) -> dict[str, Any]:
    policy = {name: getattr(row, name) for name in POLICY_FIELDS}
    for name in ("masters", "slaves"):
        if policy[name] is not None:
            policy[name] = sorted(policy[name])
    return {
        "relay_id": row.relay_id,
        "stations": sorted((row.station_a, row.station_b)),
        "retired": row.retired_at is not None,
        "policy": policy,
    }


def _link(row: QkdLink) -> dict[str, Any]:
    return {
        "relay_id": row.relay_id,
        "station_id": row.station_id,
        "retired": row.retired_at is not None,
    }


def _node(row: RegistryNode) -> dict[str, Any]:
    return {"role": row.role, "retired": row.retired_at is not None}


def _sae(row: Principal) -> dict[str, Any]:
    return {"station_id": row.station_id, "retired": row.retired_at is not None}


def _named(facts: Mapping[str, Any], here: str, peer: str) -> set[str]:
    """The two nodes and every node their shared pairs and links name."""
    named = {here, peer}
    for pair in facts["pairs"].values():
        named.update((pair["relay_id"], *pair["stations"]))
    for link in facts["links"].values():
        named.update((link["relay_id"], link["station_id"]))
    return named


def _partners(facts: Mapping[str, Any]) -> bool:
    """Whether the structure holds a pair whose two stations are its two nodes."""
    both = {facts["node"], facts["peer"]}
    return any(set(p["stations"]) == both for p in facts["pairs"].values())


def shared_part(facts: Mapping[str, Any]) -> Facts:
    """The part of a structure that its two nodes (``node``, ``peer``) share, by the
    rules above; applied to this node's rows and, as a defence, to a peer's answer,
    so that facts a peer names beyond them are never compared or recorded."""
    here, peer = facts["node"], facts["peer"]
    pairs = {
        pair_id: pair
        for pair_id, pair in facts["pairs"].items()
        if {here, peer} <= {pair["relay_id"], *pair["stations"]}
    }
    links = {
        link_id: link
        for link_id, link in facts["links"].items()
        if {link["relay_id"], link["station_id"]} == {here, peer}
    }
    out: Facts = {"v": facts["v"], "node": here, "peer": peer, "pairs": pairs, "links": links}
    named = _named(out, here, peer)
    out["nodes"] = {n: fact for n, fact in facts["nodes"].items() if n in named}
    partners = _partners(out)
    out["saes"] = {
        sae: fact
        for sae, fact in facts["saes"].items()
        if partners and fact["station_id"] in (here, peer)
    }
    return out


def compare(ours: Mapping[str, Any], theirs: Mapping[str, Any]) -> list[Finding]:
    """The shared facts two structures differ on, sorted by kind, id and field.

    ``ours`` is this node's (:func:`shared_facts`), ``theirs`` the peer's answer, whose
    ``node`` and ``peer`` must be ours swapped; only the shared part of ``theirs`` is
    looked at (:func:`shared_part`). Nodes are compared where both sides' shared facts
    name them, SAEs where both sides hold a pair of the two stations: a pair only one
    side holds is reported as that pair, not again as what it would have brought along.

    Raises:
        NotTheirs: ``theirs`` is about other nodes, or of another version.
    """
    if (theirs.get("node"), theirs.get("peer")) != (ours["peer"], ours["node"]):
        raise NotTheirs("the answer is about other nodes")
    if theirs.get("v") != ours["v"]:
        raise NotTheirs("the answer is of another version")
    theirs = shared_part(theirs)
    here, peer = ours["node"], ours["peer"]
    named = _named(ours, here, peer) & _named(theirs, here, peer)
    findings: list[Finding] = []
    for kind, member in KINDS.items():
        mine, other = ours[member], theirs[member]
        if kind == "node":
            mine = {k: v for k, v in mine.items() if k in named}
            other = {k: v for k, v in other.items() if k in named}
        if kind == "sae" and not (_partners(ours) and _partners(theirs)):
            continue
        findings += _differences(kind, mine, other)
    return findings


def _differences(
    kind: str, mine: Mapping[str, Mapping[str, Any]], other: Mapping[str, Mapping[str, Any]]
) -> Iterable[Finding]:
    for entry_id in sorted(mine.keys() | other.keys()):
        if entry_id not in other:
            yield {"kind": kind, "id": entry_id, "field": MISSING_AT_PEER}
        elif entry_id not in mine:
            yield {"kind": kind, "id": entry_id, "field": MISSING_HERE}
        else:
            a, b = _flat(mine[entry_id]), _flat(other[entry_id])
            for name in sorted(a.keys() | b.keys()):
                if name not in a or name not in b or not _same(a[name], b[name]):
                    yield {"kind": kind, "id": entry_id, "field": name}


def _flat(fact: Mapping[str, Any]) -> dict[str, Any]:
    """A fact with its nested objects (the policy) as ``outer.inner`` fields."""
    out: dict[str, Any] = {}
    for name, value in fact.items():
        if isinstance(value, Mapping):
            out.update({f"{name}.{inner}": v for inner, v in value.items()})
        else:
            out[name] = value
    return out


def _same(a: Any, b: Any) -> bool:
    """Equal as JSON values: ``true`` is not ``1`` (Python's ``True == 1`` is)."""
    if isinstance(a, bool) or isinstance(b, bool):
        return type(a) is type(b) and a == b
    return bool(a == b)


def watched_peers(s: Session, here: str, reachable: Iterable[str]) -> list[str]:
    """The peer nodes this node compares with: active registry nodes other than itself
    with an active ``peer`` principal bound to them, among ``reachable`` (the node IDs
    of the ``[[peers]]`` settings, the URLs the peer client knows)."""
    wanted = sorted(set(reachable) - {here})
    if not wanted:
        return []
    rows = s.execute(
        select(RegistryNode.node_id)
        .join(Principal, Principal.node_id == RegistryNode.node_id)
        .where(
            RegistryNode.node_id.in_(wanted),
            RegistryNode.retired_at.is_(None),
            Principal.role == PrincipalRole.PEER.value,
            Principal.retired_at.is_(None),
        )
        .distinct()
        .order_by(RegistryNode.node_id)
    ).scalars()
    return list(rows)
