"""Who is calling: the principal a verified client certificate maps to."""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy import select

from keystrata.crypto.hazmat import constant_time_equal
from keystrata.domain.ledger import Event
from keystrata.domain.registry import PrincipalRole
from keystrata.services import ledger
from keystrata.services.context import NodeContext
from keystrata.storage.models import Principal


@dataclass(frozen=True, slots=True)
class Caller:
    """The authenticated caller of a request, as route handlers receive it."""

    principal_id: str
    role: PrincipalRole
    station_id: str | None = None
    link_id: str | None = None
    node_id: str | None = None


def resolve(ctx: NodeContext, subject: str, cert_sha256: str) -> Caller | None:
    """Return the active principal for a certificate subject, or None.

    When the principal pins a certificate fingerprint, the presented certificate must
    match it as well.
    """
    with ctx.db.read() as s:
        row = s.execute(
            select(Principal).where(
                Principal.cert_subject == subject, Principal.retired_at.is_(None)
            )
        ).scalar()
    if row is None:
        return None
    if row.cert_sha256 and not constant_time_equal(row.cert_sha256.encode(), cert_sha256.encode()):
        return None
    return Caller(
        principal_id=row.principal_id,
        role=PrincipalRole(row.role),
        station_id=row.station_id,
        link_id=row.link_id,
        node_id=row.node_id,
    )


def record_refusal(
    ctx: NodeContext,
    *,
    reason: str,
    subject: str | None,
    principal_id: str | None,
    method: str,
    path: str,
) -> None:
    """Write an ``auth.refused`` ledger entry in its own transaction."""
    with ctx.db.write() as s:
        ledger.append(
            s,
            node_id=ctx.node_id,
            at=ctx.clock.now(),
            event=Event.AUTH_REFUSED,
            fields={
                "reason": reason,
                "subject": (subject or "")[:255],
                "principal": principal_id,
                "method": method,
                "path": path[:255],
            },
        )
