"""Provision the demo network as an operator would: write its network description to
the workdir (``network.toml``) and apply it to every node through their APIs, the way
`keystrata network apply` does."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from keystrata.demo import scenario
from keystrata.demo.workdir import DemoNode
from keystrata_client import KeystrataClientError, TlsIdentity
from keystrata_client.network import apply as applying
from keystrata_client.network import description

#: The description's name in the workdir.
DESCRIPTION = "network.toml"
OPTICS_PROFILE = "lowmarch"


def operator_identity(workdir: Path) -> TlsIdentity:
    pki = workdir / "pki"
    return TlsIdentity(
        ca=pki / "ca.crt",
        cert=pki / f"{scenario.OPERATOR}.crt",
        key=pki / f"{scenario.OPERATOR}.key",
    )


def _value(value: Any) -> str:
    """A TOML value: strings, numbers, booleans, lists of them and inline tables."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value)  # a TOML basic string: the same escapes
    if isinstance(value, int | float):
        return repr(value)
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{k} = {_value(v)}" for k, v in value.items()) + " }"
    raise TypeError(f"no TOML form for {type(value).__name__}")


def _table(name: str, values: dict[str, Any]) -> str:
    lines = [f"[{name}]"] + [f"{k} = {_value(v)}" for k, v in values.items()]
    return "\n".join(lines) + "\n"


def description_text(nodes: list[DemoNode]) -> str:
    """The demo network's description, with the nodes' URLs of this run."""
    urls = {n.node_id: n.url for n in nodes}
    parts = [
        f"# The {scenario.ORGANISATION}'s network (an invented scenario), written by\n"
        "# `keystrata demo`. Paths are relative to this file. See what applying it would\n"
        "# change with `keystrata network check network.toml`, apply it with\n"
        "# `keystrata network apply network.toml`, and see every node with\n"
        "# `keystrata network status network.toml`.\n",
        _table(
            "network",
            {
                "name": scenario.ORGANISATION,
                "ca": "pki/ca.crt",
                "cert": f"pki/{scenario.OPERATOR}.crt",
                "key": f"pki/{scenario.OPERATOR}.key",
            },
        ),
        "# What every link shares; each link adds its receiving telescope.",
        _table(f"optics.{OPTICS_PROFILE}", scenario.OPTICS),
        _table(
            f"relays.{scenario.RELAY}",
            {
                "url": urls[scenario.RELAY],
                "certificate": f"pki/{scenario.RELAY}.crt",
                "description": "airship Vela, trusted relay",
                "platform": scenario.PLATFORM,
            },
        ),
    ]
    for st in scenario.STATIONS:
        parts.append(
            _table(
                f"stations.{st.node_id}",
                {
                    "url": urls[st.node_id],
                    "certificate": f"pki/{st.node_id}.crt",
                    "description": st.place,
                    "site": st.physical,
                },
            )
        )
        parts += [
            _table(f"stations.{st.node_id}.saes.{sae}", {"description": f"encryptor at {st.place}"})
            for sae in st.saes
        ]
    parts += [
        _table(
            f"links.{st.link_id}",
            {
                "relay": scenario.RELAY,
                "station": st.node_id,
                "description": f"Vela to {st.place}",
                "optics": {"extends": OPTICS_PROFILE, "rx_aperture_m": st.rx_aperture_m},
                "module": {"id": st.module},
            },
        )
        for st in scenario.STATIONS
    ]
    parts += [
        _table(
            f"pairs.{scenario.pair_id(a, b)}",
            {"relay": scenario.RELAY, "stations": [a, b]},
        )
        for a, b in scenario.PAIRS
    ]
    parts += [
        _table(
            f"people.{scenario.OPERATOR}",
            {
                "role": "operator",
                "certificate": f"pki/{scenario.OPERATOR}.crt",
                "description": "Ida Varga, network operator",
            },
        ),
        _table(
            f"people.{scenario.AUDITOR}",
            {"role": "auditor", "description": "Marek Olwen, auditor"},
        ),
    ]
    return "\n".join(parts)


def write_description(workdir: Path, nodes: list[DemoNode]) -> Path:
    path = workdir / DESCRIPTION
    path.write_text(description_text(nodes))
    return path


def provision(workdir: Path, nodes: list[DemoNode]) -> int:
    """Write the description and apply it to every node; return how many registry
    calls were made.

    Raises:
        KeystrataClientError: a node could not be asked, or a call failed (the message
            names the node and the node's own reason).
    """
    net = description.load(write_description(workdir, nodes))
    identity = operator_identity(workdir)
    surveys = applying.survey(net, identity, timeout=30)
    for s in surveys:
        if s.error is not None:
            raise KeystrataClientError(f"{s.node_id}: {s.error}")
    outcomes = applying.apply(net, surveys, identity, timeout=30)
    for o in outcomes:
        if o.failed:
            action, error = o.failed[0]
            raise KeystrataClientError(f"{o.node_id}: {action.describe()}: {error}")
    return sum(len(o.done) for o in outcomes)
