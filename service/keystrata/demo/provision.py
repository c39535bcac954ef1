"""Provision the demo network on every node through the operator API, as an operator
would: each node gets the part of the registry it needs."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from keystrata.demo import scenario
from keystrata.demo.workdir import DemoNode
from keystrata.loopback.pki import cert_pin
from keystrata_client import ApiError, OperatorClient, TlsIdentity


def operator_identity(workdir: Path) -> TlsIdentity:
    pki = workdir / "pki"
    return TlsIdentity(
        ca=pki / "ca.crt",
        cert=pki / f"{scenario.OPERATOR}.crt",
        key=pki / f"{scenario.OPERATOR}.key",
    )


def _create(client: OperatorClient, kind: str, body: dict[str, Any]) -> None:
    try:
        client.create(kind, body)
    except ApiError as exc:
        if exc.status != 409:  # already there from an earlier step: fine
            raise


def _facts_for(node_id: str, pki: Path) -> list[tuple[str, dict[str, Any]]]:
    """The registry entries node ``node_id`` needs, in an order that satisfies references."""
    relay = node_id == scenario.RELAY
    stations = (
        scenario.STATIONS
        if relay
        else [scenario.station(s) for s in sorted({node_id, *scenario.partners(node_id)})]
    )
    facts: list[tuple[str, dict[str, Any]]] = []
    if not relay:
        facts.append(
            (
                "nodes",
                {
                    "node_id": scenario.RELAY,
                    "role": "relay",
                    "description": "airship Vela, trusted relay",
                    "physical": scenario.PLATFORM,
                },
            )
        )
    facts += [
        (
            "nodes",
            {
                "node_id": st.node_id,
                "role": "station",
                "description": st.place,
                "physical": st.physical,
            },
        )
        for st in stations
        if st.node_id != node_id
    ]
    own_links = [st for st in stations if relay or st.node_id == node_id]
    facts += [
        (
            "links",
            {
                "link_id": st.link_id,
                "relay_id": scenario.RELAY,
                "station_id": st.node_id,
                "description": f"Vela to {st.place}",
                "optics": st.optics,
            },
        )
        for st in own_links
    ]
    for a, b in scenario.PAIRS:
        if relay or node_id in (a, b):
            facts.append(
                (
                    "pairs",
                    {
                        "pair_id": scenario.pair_id(a, b),
                        "relay_id": scenario.RELAY,
                        "stations": [a, b],
                    },
                )
            )
    facts.append(
        (
            "principals",
            {
                "principal_id": scenario.AUDITOR,
                "role": "auditor",
                "cert_subject": scenario.AUDITOR,
                "description": "Marek Olwen, auditor",
            },
        )
    )
    facts += [
        (
            "principals",
            {
                "principal_id": st.module,
                "role": "qkd-module",
                "cert_subject": st.module,
                "link_id": st.link_id,
            },
        )
        for st in own_links
    ]
    peers = [scenario.RELAY] if not relay else []
    peers += [st.node_id for st in stations if st.node_id != node_id]
    facts += [
        (
            "principals",
            {
                "principal_id": f"peer-{p}",
                "role": "peer",
                "cert_subject": p,
                # Peers are pinned to their node certificates.
                "cert_sha256": cert_pin(pki, p),
                "node_id": p,
            },
        )
        for p in peers
    ]
    if not relay:
        facts += [
            (
                "principals",
                {"principal_id": sae, "role": "sae", "cert_subject": sae, "station_id": st.node_id},
            )
            for st in stations
            for sae in st.saes
        ]
    return facts


def _own_profile(node_id: str) -> dict[str, Any]:
    """A node's own entry (written by ``node init``) gets its physical profile."""
    if node_id == scenario.RELAY:
        return {"physical": scenario.PLATFORM}
    return {"physical": scenario.station(node_id).physical}


def provision(workdir: Path, nodes: list[DemoNode]) -> int:
    """Create every registry entry at every node; return how many were sent."""
    identity = operator_identity(workdir)
    sent = 0
    for node in nodes:
        with OperatorClient(node.url, identity) as client:
            client.change("nodes", node.node_id, _own_profile(node.node_id))
            sent += 1
            for kind, body in _facts_for(node.node_id, workdir / "pki"):
                _create(client, kind, body)
                sent += 1
    return sent
