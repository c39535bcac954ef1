"""Provisioning use cases: create, list, change and retire registry entries.

Each change runs in one write transaction with its ledger entry; a rule broken half way
raises before commit, so nothing is half-written.
"""

from __future__ import annotations

from typing import Any

from pydantic import ValidationError
from sqlalchemy import or_, select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.errors import AlreadyExists, Conflict, InvalidInput, NotFound
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.registry import physical
from keystrata.registry.specs import (
    Kind,
    LinkChange,
    LinkSpec,
    NodeChange,
    NodeRole,
    NodeSpec,
    PairChange,
    PairPolicy,
    PairSpec,
    PrincipalChange,
    PrincipalRole,
    PrincipalSpec,
    check_physical,
    check_pin_kept,
)
from keystrata.storage.models import Base, Pair, Principal, QkdLink, RegistryNode

_MODEL: dict[Kind, type[Base]] = {
    Kind.NODES: RegistryNode,
    Kind.LINKS: QkdLink,
    Kind.PAIRS: Pair,
    Kind.PRINCIPALS: Principal,
}
_KEY = {
    Kind.NODES: "node_id",
    Kind.LINKS: "link_id",
    Kind.PAIRS: "pair_id",
    Kind.PRINCIPALS: "principal_id",
}
_POLICY_FIELDS = tuple(PairPolicy.model_fields)

Spec = NodeSpec | LinkSpec | PairSpec | PrincipalSpec
Change = NodeChange | LinkChange | PairChange | PrincipalChange


def _stamp(row: Any) -> dict[str, Any]:
    return {
        "created_at": row.created_at.isoformat(),
        "updated_at": row.updated_at.isoformat(),
        "retired_at": row.retired_at.isoformat() if row.retired_at else None,
    }


def to_dict(kind: Kind, row: Any) -> dict[str, Any]:
    """The public representation of a registry row (no secrets are stored in any)."""
    if kind is Kind.NODES:
        out = {
            "node_id": row.node_id,
            "role": row.role,
            "url": row.url,
            "description": row.description,
            "physical": row.physical,
        }
    elif kind is Kind.LINKS:
        out = {
            "link_id": row.link_id,
            "relay_id": row.relay_id,
            "station_id": row.station_id,
            "description": row.description,
            "optics": row.optics,
        }
    elif kind is Kind.PAIRS:
        out = {
            "pair_id": row.pair_id,
            "relay_id": row.relay_id,
            "stations": [row.station_a, row.station_b],
            "policy": {f: getattr(row, f) for f in _POLICY_FIELDS},
        }
    else:
        out = {
            "principal_id": row.principal_id,
            "role": row.role,
            "cert_subject": row.cert_subject,
            "cert_sha256": row.cert_sha256,
            "station_id": row.station_id,
            "link_id": row.link_id,
            "node_id": row.node_id,
            "description": row.description,
        }
    return out | _stamp(row)


def _active_node(s: Session, node_id: str, role: NodeRole, field: str) -> None:
    row = s.get(RegistryNode, node_id)
    if row is None or row.retired_at is not None:
        raise InvalidInput(
            f"{field}: no active node {node_id!r} in the registry",
            details=[{"field": field, "problem": "unknown node"}],
        )
    if row.role != role.value:
        raise InvalidInput(
            f"{field}: node {node_id!r} is a {row.role}, not a {role.value}",
            details=[{"field": field, "problem": f"must be a {role.value}"}],
        )


def _check_references(s: Session, spec: Spec) -> None:
    if isinstance(spec, LinkSpec):
        _active_node(s, spec.relay_id, NodeRole.RELAY, "relay_id")
        _active_node(s, spec.station_id, NodeRole.STATION, "station_id")
    elif isinstance(spec, PairSpec):
        _active_node(s, spec.relay_id, NodeRole.RELAY, "relay_id")
        for i, station in enumerate(spec.stations):
            _active_node(s, station, NodeRole.STATION, f"stations.{i}")
        a, b = sorted(spec.stations)
        clash = s.execute(
            select(Pair.pair_id).where(
                Pair.station_a == a,
                Pair.station_b == b,
                Pair.relay_id == spec.relay_id,
                Pair.retired_at.is_(None),
            )
        ).scalar()
        if clash is not None:
            raise AlreadyExists(f"pair {clash!r} already joins {a} and {b} through {spec.relay_id}")
    elif isinstance(spec, PrincipalSpec):
        if spec.station_id is not None:
            _active_node(s, spec.station_id, NodeRole.STATION, "station_id")
        if spec.node_id is not None:
            row = s.get(RegistryNode, spec.node_id)
            if row is None or row.retired_at is not None:
                raise InvalidInput(
                    f"node_id: no active node {spec.node_id!r}",
                    details=[{"field": "node_id", "problem": "unknown node"}],
                )
        if spec.link_id is not None:
            link = s.get(QkdLink, spec.link_id)
            if link is None or link.retired_at is not None:
                raise InvalidInput(
                    f"link_id: no active QKD link {spec.link_id!r}",
                    details=[{"field": "link_id", "problem": "unknown link"}],
                )
        _subject_free(s, spec.cert_subject, None)


def _subject_free(s: Session, subject: str, except_id: str | None) -> None:
    holder = s.execute(
        select(Principal.principal_id).where(
            Principal.cert_subject == subject, Principal.retired_at.is_(None)
        )
    ).scalar()
    if holder is not None and holder != except_id:
        raise AlreadyExists(
            f"certificate subject {subject!r} already belongs to an active principal ({holder})"
        )


def _new_row(spec: Spec, now: Any) -> Base:
    stamp = {"created_at": now, "updated_at": now}
    if isinstance(spec, NodeSpec):
        return RegistryNode(**spec.model_dump(mode="json"), **stamp)
    if isinstance(spec, LinkSpec):
        return QkdLink(**spec.model_dump(), **stamp)
    if isinstance(spec, PairSpec):
        a, b = sorted(spec.stations)
        return Pair(
            pair_id=spec.pair_id,
            relay_id=spec.relay_id,
            station_a=a,
            station_b=b,
            **spec.policy.model_dump(),
            **stamp,
        )
    return Principal(**spec.model_dump(mode="json"), **stamp)


def create(ctx: NodeContext, kind: Kind, spec: Spec, *, actor: str) -> dict[str, Any]:
    """Create one registry entry and return it.

    Raises:
        AlreadyExists: the ID was ever used for this kind, or a unique fact would repeat.
        InvalidInput: a reference names no active entry of the right kind.
    """
    key = getattr(spec, _KEY[kind])
    with ctx.db.write() as s:
        if s.get(_MODEL[kind], key) is not None:
            raise AlreadyExists(
                f"{kind.value}: {key!r} exists (IDs are never reused, even after retirement)"
            )
        _check_references(s, spec)
        now = ctx.clock.now()
        row = _new_row(spec, now)
        s.add(row)
        s.flush()
        physical.check_geometry(s, kind, row, "optics" if kind is Kind.LINKS else "physical")
        out = to_dict(kind, row)
        chain.append(
            s,
            node_id=ctx.node_id,
            at=now,
            event=Event.REGISTRY_CREATED,
            fields={"kind": kind.value, "id": key, "actor": actor, "value": _ledger_value(out)},
        )
    return out


def _ledger_value(out: dict[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in out.items() if k not in ("created_at", "updated_at", "retired_at")}


def list_entries(
    ctx: NodeContext,
    kind: Kind,
    *,
    include_retired: bool = False,
    role: PrincipalRole | None = None,
) -> list[dict[str, Any]]:
    """Return every entry of ``kind`` ordered by ID (active ones unless asked)."""
    model: Any = _MODEL[kind]
    query = select(model).order_by(getattr(model, _KEY[kind]))
    if not include_retired:
        query = query.where(model.retired_at.is_(None))
    if role is not None and kind is Kind.PRINCIPALS:
        query = query.where(Principal.role == role.value)
    with ctx.db.read() as s:
        return [to_dict(kind, row) for row in s.execute(query).scalars()]


def get(ctx: NodeContext, kind: Kind, key: str) -> dict[str, Any]:
    """Return one entry. Raises NotFound."""
    with ctx.db.read() as s:
        row = s.get(_MODEL[kind], key)
        if row is None:
            raise NotFound(f"{kind.value}: no entry {key!r}")
        return to_dict(kind, row)


def _load_active(s: Session, kind: Kind, key: str) -> Any:
    row: Any = s.get(_MODEL[kind], key, with_for_update=True)
    if row is None:
        raise NotFound(f"{kind.value}: no entry {key!r}")
    if row.retired_at is not None:
        raise Conflict(f"{kind.value}: {key!r} is retired and cannot change")
    return row


def change(ctx: NodeContext, kind: Kind, key: str, change: Change, *, actor: str) -> dict[str, Any]:
    """Apply a partial change and return the entry. Raises NotFound, Conflict, InvalidInput."""
    given = change.model_dump(include=change.model_fields_set)
    with ctx.db.write() as s:
        row = _load_active(s, kind, key)
        if isinstance(change, PairChange):
            current = {f: getattr(row, f) for f in _POLICY_FIELDS}
            try:
                policy = PairPolicy.model_validate(current | change.policy)
            except ValidationError as exc:
                raise InvalidInput(
                    "policy: "
                    + "; ".join(
                        f"{'.'.join(map(str, e['loc'])) or 'policy'}: {e['msg']}"
                        for e in exc.errors()
                    ),
                    details=[
                        {"field": ".".join(("policy", *map(str, e["loc"]))), "problem": e["msg"]}
                        for e in exc.errors()
                    ],
                ) from None
            given = {f: v for f, v in policy.model_dump().items() if v != current[f]}
        if isinstance(change, NodeChange) and "physical" in given:
            check_physical(row.role, given["physical"])
        if isinstance(change, PrincipalChange):
            check_pin_kept(row.role, change)
        if isinstance(change, PrincipalChange) and "cert_subject" in given:
            _subject_free(s, given["cert_subject"], key)
        if not given:
            return to_dict(kind, row)
        for name, value in given.items():
            setattr(row, name, value)
        now = ctx.clock.now()
        row.updated_at = now
        s.flush()
        if "physical" in given or "optics" in given:
            physical.check_geometry(s, kind, row, "optics" if kind is Kind.LINKS else "physical")
        out = to_dict(kind, row)
        chain.append(
            s,
            node_id=ctx.node_id,
            at=now,
            event=Event.REGISTRY_CHANGED,
            fields={"kind": kind.value, "id": key, "actor": actor, "changes": given},
        )
    return out


def _dependents(s: Session, kind: Kind, key: str) -> list[str]:
    found: list[str] = []
    if kind is Kind.NODES:
        found += [
            f"link {x}"
            for x in s.execute(
                select(QkdLink.link_id).where(
                    or_(QkdLink.relay_id == key, QkdLink.station_id == key),
                    QkdLink.retired_at.is_(None),
                )
            ).scalars()
        ]
        found += [
            f"pair {x}"
            for x in s.execute(
                select(Pair.pair_id).where(
                    or_(Pair.relay_id == key, Pair.station_a == key, Pair.station_b == key),
                    Pair.retired_at.is_(None),
                )
            ).scalars()
        ]
        found += [
            f"principal {x}"
            for x in s.execute(
                select(Principal.principal_id).where(
                    or_(Principal.station_id == key, Principal.node_id == key),
                    Principal.retired_at.is_(None),
                )
            ).scalars()
        ]
    elif kind is Kind.LINKS:
        found += [
            f"principal {x}"
            for x in s.execute(
                select(Principal.principal_id).where(
                    Principal.link_id == key, Principal.retired_at.is_(None)
                )
            ).scalars()
        ]
    return found


def retire(ctx: NodeContext, kind: Kind, key: str, *, actor: str) -> dict[str, Any]:
    """Retire an entry (it stays for the record). Raises NotFound, Conflict."""
    with ctx.db.write() as s:
        row = _load_active(s, kind, key)
        if kind is Kind.NODES and key == ctx.node_id:
            raise Conflict("a node cannot retire itself")
        blockers = _dependents(s, kind, key)
        if blockers:
            raise Conflict(
                f"{kind.value}: {key!r} is still used by "
                + ", ".join(blockers[:10])
                + "; retire those first"
            )
        now = ctx.clock.now()
        row.retired_at = now
        row.updated_at = now
        s.flush()
        out = to_dict(kind, row)
        chain.append(
            s,
            node_id=ctx.node_id,
            at=now,
            event=Event.REGISTRY_RETIRED,
            fields={"kind": kind.value, "id": key, "actor": actor},
        )
    return out
