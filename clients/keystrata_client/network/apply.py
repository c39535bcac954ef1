"""Bring every node of a description in line with it, through the nodes' registry APIs.

:func:`survey` asks each node what it holds and computes its changes
(:func:`changes.compare`); :func:`apply` makes them: creations and changes station by
station and then at the relays, in registry-kind order, so each node stays valid at
every step and no relay relays for a pair its stations do not know yet; retirements
(only when asked for) the other way round. Every call is one registry API call, so the
node checks it and writes its ledger entry; applying twice changes nothing the second
time. A call that fails is reported with the node's own message, and the other calls
go on.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

from keystrata_client._errors import ApiError, KeystrataClientError
from keystrata_client._operator import OperatorClient
from keystrata_client._tls import TlsIdentity
from keystrata_client.network import changes as changes_of
from keystrata_client.network.description import Network, certificate_of
from keystrata_client.network.desired import KIND_ORDER, apply_order, entries_for

#: Called after each call made: (node ID, the action, its error message or None).
Progress = Callable[[str, changes_of.Action, str | None], None]


@dataclass
class NodeSurvey:
    node_id: str
    url: str | None
    changes: changes_of.NodeChanges | None = None
    error: str | None = None


@dataclass
class NodeOutcome:
    node_id: str
    done: list[changes_of.Action] = field(default_factory=list)
    failed: list[tuple[changes_of.Action, str]] = field(default_factory=list)


def policy_defaults(document: Mapping[str, Any]) -> dict[str, Any] | None:
    """The defaults of a pair policy's members, from a node's OpenAPI document."""
    schemas = document.get("components", {}).get("schemas", {})
    props = schemas.get("PairPolicy", {}).get("properties")
    if not isinstance(props, dict):
        return None
    return {k: v["default"] for k, v in props.items() if isinstance(v, dict) and "default" in v}


def _client(url: str, identity: TlsIdentity, timeout: float) -> OperatorClient:
    return OperatorClient(url, identity, timeout=timeout)


def survey_node(
    net: Network,
    node_id: str,
    identity: TlsIdentity,
    *,
    retire_unlisted: bool = False,
    timeout: float = 20.0,
) -> NodeSurvey:
    """Ask one node what it holds and compute what applying would change there."""
    node = net.nodes[node_id]
    out = NodeSurvey(node_id, node.url)
    if node.url is None:
        out.error = "the description gives no url for this node"
        return out
    me = certificate_of(identity.cert).subject
    try:
        with _client(node.url, identity, timeout) as ops:
            answered = ops.node_info()
            if answered.get("node_id") != node_id:
                out.error = (
                    f"the node at {node.url} is {answered.get('node_id')!r}, not {node_id!r}"
                )
                return out
            current = {kind: ops.list(kind, include_retired=True) for kind in KIND_ORDER}
            defaults = policy_defaults(ops.api_document())
    except KeystrataClientError as exc:
        out.error = _message(exc)
        return out
    applying = [
        ("principals", p["principal_id"])
        for p in current["principals"]
        if p.get("cert_subject") == me and not p.get("retired_at")
    ]
    out.changes = changes_of.compare(
        node_id,
        entries_for(net, node_id),
        current,
        policy_defaults=defaults,
        retire_unlisted=retire_unlisted,
        keep=applying,
    )
    return out


def survey(
    net: Network, identity: TlsIdentity, *, retire_unlisted: bool = False, timeout: float = 20.0
) -> list[NodeSurvey]:
    """Every node's survey, asked at once; in :func:`desired.apply_order`."""
    order = apply_order(net)
    with ThreadPoolExecutor(max(1, min(8, len(order)))) as pool:
        jobs = [
            pool.submit(
                survey_node, net, n, identity, retire_unlisted=retire_unlisted, timeout=timeout
            )
            for n in order
        ]
        return [job.result() for job in jobs]


def _message(exc: KeystrataClientError) -> str:
    if isinstance(exc, ApiError):
        details = "; ".join(", ".join(f"{k}: {v}" for k, v in d.items()) for d in exc.details[:5])
        return f"{exc.status} {exc.message}" + (f" ({details})" if details else "")
    return str(exc)


def _call(ops: OperatorClient, action: changes_of.Action) -> None:
    if action.verb == "create":
        ops.create(action.kind, action.body)
    elif action.verb == "change":
        ops.change(action.kind, action.entry_id, action.body)
    else:
        ops.retire(action.kind, action.entry_id)


def apply(
    net: Network,
    surveys: list[NodeSurvey],
    identity: TlsIdentity,
    *,
    progress: Progress | None = None,
    timeout: float = 20.0,
) -> list[NodeOutcome]:
    """Make the surveyed changes; return what was done and what failed, per node."""
    outcomes = {s.node_id: NodeOutcome(s.node_id) for s in surveys}
    ready = [s for s in surveys if s.changes is not None and s.url is not None]

    def run(s: NodeSurvey, verbs: tuple[str, ...]) -> None:
        assert s.changes is not None and s.url is not None
        todo = [a for a in s.changes.actions if a.verb in verbs]
        if not todo:
            return
        with _client(s.url, identity, timeout) as ops:
            for action in todo:
                error: str | None = None
                try:
                    _call(ops, action)
                except KeystrataClientError as exc:
                    error = _message(exc)
                    outcomes[s.node_id].failed.append((action, error))
                else:
                    outcomes[s.node_id].done.append(action)
                if progress is not None:
                    progress(s.node_id, action, error)

    for s in ready:
        run(s, ("create", "change"))
    for s in reversed(ready):
        run(s, ("retire",))
    return [outcomes[s.node_id] for s in surveys]
