"""Link key pool levels as operators and auditors see them."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime, timedelta

from sqlalchemy import case, func, select

from keystrata.context import NodeContext
from keystrata.errors import NotFound
from keystrata.storage.models import LinkBlock, QkdLink


def ends_here(ctx: NodeContext, link: QkdLink) -> bool:
    """True when this node is one end of ``link``."""
    return ctx.node_id in (link.relay_id, link.station_id)


@dataclass(frozen=True)
class PoolLevel:
    link_id: str
    peer_node_id: str
    bits_available: int
    bits_used: int
    bits_received: int
    blocks_available: int
    rate_bps: float
    window_seconds: int
    last_block_at: str | None
    #: Mean QBER of the blocks received over the window, weighted by their length
    #: (None when none arrived): what the QKD module reported with each block.
    qber: float | None = None


def pool_levels(ctx: NodeContext, link_id: str | None = None) -> list[PoolLevel]:
    """Return the link key pool of every active link ending at this node (or one link).

    ``rate_bps`` is the bits received over the last ``ingest.rate_window_seconds``, and
    ``qber`` their mean QBER.

    Raises:
        NotFound: ``link_id`` given but no such active link ends at this node.
    """
    window = ctx.settings.ingest.rate_window_seconds
    since = ctx.clock.now() - timedelta(seconds=window)
    with ctx.db.read() as s:
        q = select(QkdLink).where(QkdLink.retired_at.is_(None)).order_by(QkdLink.link_id)
        if link_id is not None:
            q = q.where(QkdLink.link_id == link_id)
        links = [lk for lk in s.execute(q).scalars() if ends_here(ctx, lk)]
        if link_id is not None and not links:
            raise NotFound(f"no active QKD link {link_id!r} ends at this node")
        out = []
        for link in links:
            total, used, avail_blocks, recent, last, errors = s.execute(
                select(
                    func.coalesce(func.sum(LinkBlock.length), 0),
                    func.coalesce(func.sum(LinkBlock.used), 0),
                    func.coalesce(
                        func.sum(case((LinkBlock.used < LinkBlock.length, 1), else_=0)), 0
                    ),
                    func.coalesce(
                        func.sum(case((LinkBlock.received_at >= since, LinkBlock.length), else_=0)),
                        0,
                    ),
                    func.max(LinkBlock.received_at),
                    func.coalesce(
                        func.sum(
                            case(
                                (LinkBlock.received_at >= since, LinkBlock.length * LinkBlock.qber),
                                else_=0.0,
                            )
                        ),
                        0.0,
                    ),
                ).where(LinkBlock.link_id == link.link_id)
            ).one()
            peer = link.station_id if ctx.node_id == link.relay_id else link.relay_id
            out.append(
                PoolLevel(
                    link_id=link.link_id,
                    peer_node_id=peer,
                    bits_available=8 * (int(total) - int(used)),
                    bits_used=8 * int(used),
                    bits_received=8 * int(total),
                    blocks_available=int(avail_blocks),
                    rate_bps=8 * int(recent) / window,
                    window_seconds=window,
                    last_block_at=_iso(last),
                    qber=float(errors) / int(recent) if recent else None,
                )
            )
    return out


def _iso(value: object) -> str | None:
    if value is None:
        return None
    if isinstance(value, str):  # SQLite returns aggregates of timestamps as text
        value = datetime.fromisoformat(value)
    assert isinstance(value, datetime)
    if value.tzinfo is None:
        value = value.replace(tzinfo=UTC)
    return value.astimezone(UTC).isoformat()
