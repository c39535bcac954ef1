"""What each node's registry should hold, from a network description.

A node holds what it takes part in, and no more:

- every node: its own entry, the nodes it talks to (the relay of each of its links and
  pairs, its partner stations) with their peer principals pinned to their node
  certificates, and the people (operators, auditors, monitors);
- a relay: the QKD links it is an end of with their modules, and the pairs it relays;
- a station: its own QKD links with their modules, the pairs it is a station of, its
  own SAEs and the SAEs of its partner stations (they are named as masters and slaves).

Entries are the bodies of the registry API's create calls, so a node checks them as
if an operator had typed them.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from keystrata_client.network.description import Network

#: Registry kinds in the order that keeps references valid: an entry refers only to
#: entries of kinds before it (a link to its nodes, a pair to its relay and stations,
#: a principal to its station, link or node).
KIND_ORDER = ("nodes", "links", "pairs", "principals")
#: The ID member of each kind's body.
ID_FIELD = {
    "nodes": "node_id",
    "links": "link_id",
    "pairs": "pair_id",
    "principals": "principal_id",
}


@dataclass(frozen=True)
class Entry:
    kind: str
    entry_id: str
    body: dict[str, Any]


def peer_principal(node_id: str) -> str:
    """The principal ID under which a node knows a peer node."""
    return f"peer-{node_id}"


def peers_of(net: Network, node_id: str) -> list[str]:
    """The nodes ``node_id`` exchanges messages with: link ends and pair members."""
    out: set[str] = set()
    for link in net.links.values():
        if node_id in (link.relay, link.station):
            out |= {link.relay, link.station}
    for pair in net.pairs.values():
        members = {pair.relay, *pair.stations}
        if node_id in members:
            out |= members
    out.discard(node_id)
    return sorted(out)


def entries_for(net: Network, node_id: str) -> list[Entry]:
    """The registry entries node ``node_id`` should hold, in :data:`KIND_ORDER`."""
    me = net.nodes[node_id]
    peers = peers_of(net, node_id)
    out: list[Entry] = []
    for n in [me] + [net.nodes[p] for p in peers]:
        out.append(
            Entry(
                "nodes",
                n.node_id,
                {
                    "node_id": n.node_id,
                    "role": n.role,
                    "url": n.url,
                    "description": n.description,
                    "physical": n.physical,
                },
            )
        )
    links = [k for k in net.links.values() if node_id in (k.relay, k.station)]
    out += [
        Entry(
            "links",
            k.link_id,
            {
                "link_id": k.link_id,
                "relay_id": k.relay,
                "station_id": k.station,
                "description": k.description,
                "optics": k.optics,
            },
        )
        for k in links
    ]
    pairs = [p for p in net.pairs.values() if node_id in (p.relay, *p.stations)]
    out += [
        Entry(
            "pairs",
            p.pair_id,
            {
                "pair_id": p.pair_id,
                "relay_id": p.relay,
                "stations": list(p.stations),
                "policy": dict(p.policy),
            },
        )
        for p in pairs
    ]
    principals: list[dict[str, Any]] = [
        _principal(p.principal_id, p.role, p.certificate, p.description)
        for p in net.people.values()
    ]
    principals += [
        _principal(k.module_id, "qkd-module", k.module, f"QKD module of {k.link_id}")
        | {"link_id": k.link_id}
        for k in links
    ]
    principals += [
        _principal(peer_principal(p), "peer", net.nodes[p].certificate, f"node {p}")
        | {"node_id": p}
        for p in peers
    ]
    if me.role == "station":
        stations = {node_id} | {s for p in pairs for s in p.stations}
        principals += [
            _principal(s.sae_id, "sae", s.certificate, s.description) | {"station_id": s.station}
            for s in net.saes.values()
            if s.station in stations
        ]
    out += [Entry("principals", p["principal_id"], p) for p in principals]
    return out


def _principal(principal_id: str, role: str, cert: Any, description: str) -> dict[str, Any]:
    body: dict[str, Any] = {
        "principal_id": principal_id,
        "role": role,
        "cert_subject": cert.subject,
        "description": description,
    }
    if cert.sha256 is not None:
        body["cert_sha256"] = cert.sha256
    return body


def apply_order(net: Network) -> list[str]:
    """Nodes in the order creations and changes go: stations before relays, so a relay
    never relays for a pair (or over a link) its stations do not know yet. Retirements
    go the other way."""
    return [n.node_id for n in net.stations()] + [n.node_id for n in net.relays()]
