"""What applying a description would change on one node: pure, from the entries the
node should hold (:mod:`desired`) and those it holds (the registry API's lists).

- an entry the node lacks is created;
- an entry whose changeable fields differ is changed, sending only those fields (for a
  pair, only the policy members that differ);
- an entry that differs in a field the registry never changes (a link's ends, a pair's
  stations, a principal's role or binding), or that is retired on the node, cannot be
  brought in line: a *conflict*, reported and left alone (retired IDs are never reused;
  the description needs a new ID);
- an active entry the description does not list is reported as *unlisted*; it is retired
  only when asked (never the node's own entry, nor the principal applying).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from keystrata_client.network.desired import ID_FIELD, KIND_ORDER, Entry

#: Fields the registry lets an operator change, per kind; every other field is fixed.
CHANGEABLE = {
    "nodes": ("url", "description", "physical"),
    "links": ("description", "optics"),
    "pairs": ("policy",),
    "principals": ("cert_subject", "cert_sha256", "description"),
}
FIXED = {
    "nodes": ("role",),
    "links": ("relay_id", "station_id"),
    "pairs": ("relay_id", "stations"),
    "principals": ("role", "station_id", "link_id", "node_id"),
}


@dataclass(frozen=True)
class Action:
    """One call to make: ``create`` (body), ``change`` (the changed fields), ``retire``."""

    verb: str
    kind: str
    entry_id: str
    body: dict[str, Any]
    fields: tuple[str, ...] = ()

    def describe(self) -> str:
        what = f"{self.verb} {self.kind} {self.entry_id}"
        return f"{what}: {', '.join(self.fields)}" if self.fields else what


@dataclass(frozen=True)
class Conflict:
    kind: str
    entry_id: str
    problem: str

    def describe(self) -> str:
        return f"{self.kind} {self.entry_id}: {self.problem}"


@dataclass
class NodeChanges:
    node_id: str
    actions: list[Action] = field(default_factory=list)
    conflicts: list[Conflict] = field(default_factory=list)
    unlisted: list[tuple[str, str]] = field(default_factory=list)
    unchanged: int = 0

    @property
    def empty(self) -> bool:
        return not self.actions and not self.conflicts


def _same(kind: str, name: str, want: Any, have: Any) -> bool:
    if kind == "pairs" and name == "stations":
        return sorted(want) == sorted(have or [])
    return bool(want == have)


def _policy_changes(want: Mapping[str, Any], have: Mapping[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in want.items() if have.get(k) != v}


def compare(
    node_id: str,
    desired: Iterable[Entry],
    current: Mapping[str, list[dict[str, Any]]],
    *,
    policy_defaults: Mapping[str, Any] | None = None,
    retire_unlisted: bool = False,
    keep: Iterable[tuple[str, str]] = (),
) -> NodeChanges:
    """Compare what node ``node_id`` should hold with what it holds.

    ``current`` maps each kind to the node's entries, retired ones included.
    ``policy_defaults`` completes each pair's policy with the values the node uses for
    members a description leaves out, so leaving one out means "the default" rather
    than "whatever the node has". ``keep`` are (kind, ID) never retired.
    """
    out = NodeChanges(node_id)
    held = {kind: {e[ID_FIELD[kind]]: e for e in current.get(kind, [])} for kind in KIND_ORDER}
    wanted: set[tuple[str, str]] = set()
    for entry in desired:
        wanted.add((entry.kind, entry.entry_id))
        have = held[entry.kind].get(entry.entry_id)
        body = dict(entry.body)
        if entry.kind == "pairs" and policy_defaults:
            body["policy"] = dict(policy_defaults) | body["policy"]
        if have is None:
            out.actions.append(Action("create", entry.kind, entry.entry_id, dict(entry.body)))
            continue
        if have.get("retired_at"):
            out.conflicts.append(
                Conflict(
                    entry.kind,
                    entry.entry_id,
                    "retired on this node; retired IDs are never reused, give it a new ID",
                )
            )
            continue
        fixed = [
            f
            for f in FIXED[entry.kind]
            if f in body and not _same(entry.kind, f, body[f], have.get(f))
        ]
        if fixed:
            out.conflicts.append(
                Conflict(
                    entry.kind,
                    entry.entry_id,
                    f"{', '.join(fixed)} differ and cannot change; retire it and describe "
                    "a new entry",
                )
            )
            continue
        change: dict[str, Any] = {}
        names: list[str] = []
        for f in CHANGEABLE[entry.kind]:
            want = body.get(f)
            if entry.kind == "pairs":
                diff = _policy_changes(want or {}, have.get(f) or {})
                if diff:
                    change["policy"] = diff
                    names += [f"policy.{k}" for k in sorted(diff)]
            elif want != have.get(f):
                change[f] = want
                names.append(f)
        if change:
            out.actions.append(Action("change", entry.kind, entry.entry_id, change, tuple(names)))
        else:
            out.unchanged += 1
    kept = {("nodes", node_id), *keep}
    for kind in reversed(KIND_ORDER):
        for entry_id, have in sorted(held[kind].items()):
            if have.get("retired_at") or (kind, entry_id) in wanted:
                continue
            if retire_unlisted and (kind, entry_id) not in kept:
                out.actions.append(Action("retire", kind, entry_id, {}))
            else:
                out.unlisted.append((kind, entry_id))
    return out
