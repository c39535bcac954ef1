"""Who is calling: the principal a verified client certificate maps to; and refused
callers in the ledger.

A refusal is written as ``auth.refused`` with the route template and a keyed hash of the
raw path (never the path: a client may put a key in it), and the certificate subject only
when it names a registered principal (else a keyed hash of it). Refusals of one subject,
reason and route are aggregated per ``[ledger] refusal_interval_seconds``: the first of an
interval is written at once, later ones are counted and written with the next entry of
that key, or by :func:`flush_refusals` once the interval is over. The counts live in this
worker process's memory (each worker aggregates on its own, so with N workers a key costs
at most N entries per interval); a crash loses the counts not yet written.
"""

from __future__ import annotations

import logging
import threading
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import select

from keystrata.context import NodeContext
from keystrata.crypto.hazmat import constant_time_equal, keyed_fingerprint
from keystrata.ledger import chain
from keystrata.ledger.entries import Event, timestamp
from keystrata.registry import cache
from keystrata.registry.specs import PINNED_ROLES, PrincipalRole
from keystrata.storage.models import Principal

log = logging.getLogger("keystrata.identity")

#: Domain separation of the keyed hashes under the node's fingerprint key (which also
#: recognises re-sent link blocks, whose first part is a link ID: no spaces there).
PATH_HASH_LABEL = b"keystrata auth.refused path v1"
SUBJECT_HASH_LABEL = b"keystrata auth.refused subject v1"
#: Route template recorded when the request matched no route.
NO_ROUTE = "(no route)"
#: Aggregation windows kept per process; beyond, refusals share one overflow window.
MAX_WINDOWS = 4096
#: Reasons whose subject no CA vouched for (none, or a forged certificate in proxy
#: mode): aggregated under one subject, so new subjects cannot open new windows.
UNVERIFIED_REASONS = frozenset({"no_certificate", "certificate_not_from_ca"})
_UNVERIFIED = "(unverified)"
_OVERFLOW = "(overflow)"
_METHODS = frozenset({"GET", "HEAD", "POST", "PUT", "PATCH", "DELETE", "OPTIONS"})


@dataclass(frozen=True, slots=True)
class Caller:
    """The authenticated caller of a request, as route handlers receive it."""

    principal_id: str
    role: PrincipalRole
    station_id: str | None = None
    link_id: str | None = None
    node_id: str | None = None
    #: The registry generation this caller was resolved at (registry/cache.py); None
    #: for callers built by hand, whose requests read the generation themselves.
    generation: int | None = field(default=None, compare=False, repr=False)


@dataclass(frozen=True, slots=True)
class _Registered:
    """What the registry says of the active principal of a certificate subject."""

    principal_id: str
    role: str
    cert_sha256: str | None
    station_id: str | None
    link_id: str | None
    node_id: str | None


def _active_by_subject(ctx: NodeContext, subject: str) -> _Registered | None:
    with ctx.db.read() as s:
        row = s.execute(
            select(Principal).where(
                Principal.cert_subject == subject, Principal.retired_at.is_(None)
            )
        ).scalar()
        if row is None:
            return None
        return _Registered(
            row.principal_id, row.role, row.cert_sha256, row.station_id, row.link_id, row.node_id
        )


def resolve(ctx: NodeContext, subject: str, cert_sha256: str) -> Caller | None:
    """Return the active principal for a certificate subject, or None.

    When the principal pins a certificate fingerprint, the presented certificate must
    match it as well.
    """
    snapshot = cache.fresh(ctx)
    row = snapshot.get("principal.subject", subject, lambda: _active_by_subject(ctx, subject))
    if row is None:
        return None
    if row.cert_sha256 is None and PrincipalRole(row.role) in PINNED_ROLES:
        # Registered before pins were required: refused until pinned (`keystrata node pin`).
        log.warning("principal %s (%s) has no certificate pin: refused", row.principal_id, row.role)
        return None
    if row.cert_sha256 and not constant_time_equal(row.cert_sha256.encode(), cert_sha256.encode()):
        return None
    return Caller(
        principal_id=row.principal_id,
        role=PrincipalRole(row.role),
        station_id=row.station_id,
        link_id=row.link_id,
        node_id=row.node_id,
        generation=snapshot.generation,
    )


# ---------------------------------------------------------------- refusals


@dataclass
class _Window:
    opened: datetime
    pending: int = 0  # refusals counted since the window opened, not written yet
    since: datetime | None = None  # the first of them
    last: dict[str, Any] = field(default_factory=dict)  # fields of the latest of them


class RefusalDigest:
    """This process's aggregation windows, keyed by (subject key, reason, route)."""

    def __init__(self, max_windows: int = MAX_WINDOWS) -> None:
        self.lock = threading.Lock()
        self.windows: dict[tuple[str, str, str], _Window] = {}
        self.max_windows = max_windows


def refusal_digest(ctx: NodeContext) -> RefusalDigest:
    """The node context's refusal windows (created on first use)."""
    digest = ctx.process_state.get("auth.refused")
    if digest is None:
        digest = ctx.process_state.setdefault("auth.refused", RefusalDigest())
    assert isinstance(digest, RefusalDigest)
    return digest


def _hash(ctx: NodeContext, label: bytes, value: str) -> str:
    return keyed_fingerprint(
        ctx.fingerprint_key, label, value.encode("utf-8", "surrogatepass")
    ).hex()


def record_refusal(
    ctx: NodeContext,
    *,
    reason: str,
    subject: str | None,
    principal_id: str | None,
    method: str,
    path: str,
    route: str | None = None,
) -> None:
    """Count a refused request; write an ``auth.refused`` entry (in its own transaction)
    unless one of the same subject, reason and route was written within the interval.

    Raises:
        Unavailable: the entry could not be written (the count is kept for the next).
    """
    now = ctx.clock.now()
    subject_hash = _hash(ctx, SUBJECT_HASH_LABEL, subject) if subject is not None else None
    fields: dict[str, Any] = {
        "reason": reason,
        "subject": subject,  # replaced below unless it names a registered principal
        "subject_hash": subject_hash,
        "principal": principal_id,
        "method": method if method in _METHODS else "other",
        "route": route or NO_ROUTE,
        "path_hash": _hash(ctx, PATH_HASH_LABEL, path),
    }
    who = _UNVERIFIED if reason in UNVERIFIED_REASONS else subject_hash or ""
    key = (who, reason, fields["route"])
    interval = timedelta(seconds=ctx.settings.ledger.refusal_interval_seconds)
    digest = refusal_digest(ctx)
    with digest.lock:
        if key not in digest.windows and len(digest.windows) >= digest.max_windows:
            _prune(digest, now, interval)
            if len(digest.windows) >= digest.max_windows:
                key = (_OVERFLOW, reason, fields["route"])
        window = digest.windows.get(key)
        if window is not None and now < window.opened + interval:
            window.pending += 1
            window.since = window.since or now
            window.last = fields
            return
        count = 1 + (window.pending if window else 0)
        since = window.since if window and window.since else now
        digest.windows[key] = _Window(opened=now)
    try:
        _write(ctx, [(now, fields, count, since)])
    except BaseException:
        with digest.lock:  # keep the count for the next entry of this key
            window = digest.windows.setdefault(key, _Window(opened=now))
            window.pending += count
            window.since = min(window.since or since, since)
            window.last = window.last or fields
        raise


def flush_refusals(ctx: NodeContext, *, everything: bool = False) -> int:
    """Write the counts of windows whose interval is over (``everything``: of all
    windows, at shutdown) and forget those windows; return the entries written."""
    now = ctx.clock.now()
    interval = timedelta(seconds=ctx.settings.ledger.refusal_interval_seconds)
    digest = refusal_digest(ctx)
    with digest.lock:
        due = [k for k, w in digest.windows.items() if everything or now >= w.opened + interval]
        windows = [digest.windows.pop(k) for k in due]
    pending = [(now, w.last, w.pending, w.since or now) for w in windows if w.pending]
    if pending:
        _write(ctx, pending)
    return len(pending)


def _prune(digest: RefusalDigest, now: datetime, interval: timedelta) -> None:
    """Forget windows that are over and have nothing to write (caller holds the lock)."""
    for k in [k for k, w in digest.windows.items() if not w.pending and now >= w.opened + interval]:
        del digest.windows[k]


def _write(
    ctx: NodeContext, refusals: list[tuple[datetime, dict[str, Any], int, datetime]]
) -> None:
    with ctx.db.write() as s:
        entries = []
        for at, fields, count, since in refusals:
            entry = dict(fields)
            principal, retired = _registered(s, entry["subject"])
            if principal is None:
                entry["subject"] = None
            elif entry["reason"] == "unknown_certificate":
                # A registered subject that resolve() did not admit: retired, or a
                # certificate other than the pinned one.
                entry["principal"] = principal
                if retired:
                    entry["reason"] = "retired_principal"
            entry["count"] = count
            entry["since"] = timestamp(since)
            entries.append((at, Event.AUTH_REFUSED, entry))
        chain.append_many(s, node_id=ctx.node_id, entries=entries)


def _registered(s: Any, subject: str | None) -> tuple[str | None, bool]:
    """The principal ID a subject names (an active one first) and whether it is retired."""
    if subject is None:
        return None, False
    rows = s.execute(
        select(Principal.principal_id, Principal.retired_at).where(
            Principal.cert_subject == subject
        )
    ).all()
    if not rows:
        return None, False
    active = [r for r in rows if r.retired_at is None]
    row = (active or rows)[0]
    return str(row.principal_id), row.retired_at is not None
