"""Watching the registry facts this node shares with its peers.

Every ``[peer] registry_compare_seconds``, for each peer node this node compares with
(:func:`keystrata.registry.comparison.watched_peers`: an active peer principal and a
``[[peers]]`` URL), one worker process (the holder of the lease
``registry-compare:<peer>``) asks the peer for the facts it shares with this node
(``GET /api/v1/peer/registry/shared``), compares them with its own and keeps what it
found in ``peer_registry_view``: the names of the differing facts, when the last
comparison got an answer, and why the last attempt failed, if it did. A change of the
set of differing facts is written to the ledger in the same transaction, under the
view row's lock, so two workers never write it twice: ``registry.peer_disagrees`` (the
peer, the count and the facts, at most :data:`MAX_LISTED`) or, when the set empties,
``registry.peer_agrees``. Nothing decides who is right and nothing else changes: the
metrics and the readiness note (observability/) are read from the table.

The peer's answer is hostile until checked: it is parsed once
(:class:`keystrata.peering.answers.SharedRegistry`), must be about the two nodes
compared, and only its shared part is looked at; its errors are recorded in our own
words, never with what the peer wrote.
"""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any, Protocol

from sqlalchemy import select
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.errors import InvalidInput, PeerUnavailable
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.peering.answers import SharedRegistry
from keystrata.registry import comparison
from keystrata.storage import leases
from keystrata.storage.db import upsert_insert
from keystrata.storage.models import PeerRegistryView

log = logging.getLogger("keystrata.registry_watch")

LEASE_PREFIX = "registry-compare:"
#: Differing facts listed in one ledger entry (its ``count`` says how many there are).
MAX_LISTED = 256
#: ``ctx.process_state`` key: the last failure logged per peer, so a peer that stays away
#: is logged once, not every round.
_LOGGED = "registry_watch.logged"


class SharedRegistrySource(Protocol):
    """Where the peer's shared facts come from (the process's ``PeerClient``)."""

    def registry_shared(self, node_id: str) -> dict[str, Any]:
        """The peer's answer as JSON. Raises PeerUnavailable."""
        ...


@dataclass(frozen=True)
class View:
    """What the last comparison with one peer found (``checked_at`` None: no
    comparison has got an answer yet)."""

    peer_id: str
    checked_at: datetime | None
    disagreements: list[comparison.Finding] = field(default_factory=list)
    last_error: str | None = None


def watched(ctx: NodeContext) -> list[str]:
    """The peers this node compares its shared registry facts with."""
    with ctx.db.read() as s:
        return comparison.watched_peers(s, ctx.node_id, (p.id for p in ctx.settings.peers))


def compare_once(ctx: NodeContext, source: SharedRegistrySource, holder: str) -> bool:
    """Compare with every watched peer whose lease this holder takes. Returns False
    (the loop waits a whole interval)."""
    interval = ctx.settings.peer.registry_compare_seconds
    ttl = timedelta(seconds=max(30.0, 3 * interval))
    for peer in watched(ctx):
        if leases.acquire(ctx.db, LEASE_PREFIX + peer, holder, now=ctx.clock.now(), ttl=ttl):
            compare_with(ctx, source, peer)
    return False


def compare_with(
    ctx: NodeContext, source: SharedRegistrySource, peer: str
) -> list[comparison.Finding] | None:
    """Ask ``peer``, compare, record; return the differing facts, or None when the peer
    gave no usable answer (recorded as the view's ``last_error``) or this node's own
    facts changed while it was asked (compared again next round)."""
    ours = comparison.shared_facts(ctx, peer)
    try:
        theirs = SharedRegistry.from_json(source.registry_shared(peer)).to_json()
        findings = comparison.compare(ours, theirs)
    except PeerUnavailable as exc:
        _failed(ctx, peer, exc.message)
        return None
    except InvalidInput:
        # The parser's message can quote a member name the peer chose: fixed words only.
        _failed(ctx, peer, f"{peer}: the answer is malformed")
        return None
    except comparison.NotTheirs as exc:
        _failed(ctx, peer, f"{peer}: {exc}")
        return None
    if comparison.shared_facts(ctx, peer) != ours:
        log.info("registry facts shared with %s changed while comparing; next round", peer)
        return None
    record(ctx, peer, findings)
    ctx.process_state.setdefault(_LOGGED, {}).pop(peer, None)
    return findings


def record(ctx: NodeContext, peer: str, findings: list[comparison.Finding]) -> bool:
    """Keep what a comparison with ``peer`` found; when the set of differing facts
    changed, write its ledger entry in the same transaction. Returns whether it wrote
    one. The view row is read under its lock (created first if missing, ``ON CONFLICT
    DO NOTHING``), so of two workers recording the same finding only the first writes."""
    with ctx.db.write() as s:
        now = ctx.clock.now()
        row = _locked_row(ctx, s, peer)
        previous = _findings(row.disagreements)
        row.checked_at = now
        row.disagreements = json.dumps(findings, separators=(",", ":"))
        row.count = len(findings)
        row.last_error = None
        if findings == previous:
            return False
        if findings:
            event = Event.REGISTRY_PEER_DISAGREES
            fields: dict[str, Any] = {
                "peer": peer,
                "count": len(findings),
                "disagreements": findings[:MAX_LISTED],
            }
            log.warning("registry facts differ from %s's: %s", peer, describe(findings))
        else:
            event = Event.REGISTRY_PEER_AGREES
            fields = {"peer": peer, "cleared": len(previous)}
            log.info("registry facts shared with %s agree again", peer)
        chain.append(s, node_id=ctx.node_id, at=now, event=event, fields=fields)
    return True


def _failed(ctx: NodeContext, peer: str, why: str) -> None:
    """Note why ``peer`` gave no usable answer; what was found before stays (a peer
    never compared gets its row now, with no ``checked_at``)."""
    why = why[:255]
    logged: dict[str, str] = ctx.process_state.setdefault(_LOGGED, {})
    if logged.get(peer) != why:
        log.warning("registry comparison with %s: no usable answer (%s)", peer, why)
        logged[peer] = why
    with ctx.db.write() as s:
        row = _locked_row(ctx, s, peer)
        if row.last_error != why:
            row.last_error = why


def _locked_row(ctx: NodeContext, s: Session, peer: str) -> PeerRegistryView:
    """The view row of ``peer``, locked; made first when missing (no comparison yet:
    ``ON CONFLICT DO NOTHING``, so two workers make one, and each then waits its turn)."""
    row = s.get(PeerRegistryView, peer, with_for_update=True)
    if row is None:
        s.execute(
            upsert_insert(ctx.db.backend)(PeerRegistryView)
            .values(peer_id=peer, checked_at=None, disagreements="[]", count=0)
            .on_conflict_do_nothing(index_elements=["peer_id"])
        )
        row = s.get(PeerRegistryView, peer, with_for_update=True, populate_existing=True)
        assert row is not None  # inserted now, or committed by another worker
    return row


def _findings(text: str) -> list[comparison.Finding]:
    value = json.loads(text)
    return value if isinstance(value, list) else []


def describe(findings: list[comparison.Finding], limit: int = 10) -> str:
    """``pair pair-x policy.priority, link link-y missing_here`` (names only), at most
    ``limit`` of them and how many more."""
    text = ", ".join(f"{f['kind']} {f['id']} {f['field']}" for f in findings[:limit])
    more = len(findings) - limit
    return text + (f" and {more} more" if more > 0 else "")


def views(ctx: NodeContext) -> list[View]:
    """The last comparison with each watched peer, in peer order (peers no longer
    watched are left out; their rows stay for the record)."""
    with ctx.db.read() as s:
        peers = comparison.watched_peers(s, ctx.node_id, (p.id for p in ctx.settings.peers))
        rows = {
            r.peer_id: r
            for r in s.execute(
                select(PeerRegistryView).where(PeerRegistryView.peer_id.in_(peers))
            ).scalars()
        }
    out = []
    for peer in peers:
        row = rows.get(peer)
        if row is None:
            out.append(View(peer, None))
        else:
            out.append(View(peer, row.checked_at, _findings(row.disagreements), row.last_error))
    return out
