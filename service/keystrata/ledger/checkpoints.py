"""Signed checkpoints of the ledger: the tree size, root hash and signing time, signed
with the node's Ed25519 ledger key (RFC 8032). The signed text is the body of a C2SP tlog
checkpoint (origin, tree size, Base64 root hash, one per line) followed by one extension
line of ours that carries the format version and the signing time::

    <origin>\\n<tree size>\\n<base64 root hash>\\nkeystrata/v2 signed-at <time>\\n

with the node ID as origin and the time in RFC 3339, UTC, microseconds and ``Z``
(``2026-12-02T10:49:00.000000Z``, as ledger entries write ``at``). A reader of C2SP
checkpoints takes the fourth line as an extension line and still reads the first three.
Checkpoints signed before this format (version 1) have no fourth line: verifiers report
them as "no signing time". Checkpoints are kept; auditors fetch them with the public key.
"""

from __future__ import annotations

import base64
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy import select

from keystrata.context import NodeContext
from keystrata.crypto.hazmat import public_key_of, sign
from keystrata.ledger.chain import StoredTree
from keystrata.ledger.entries import timestamp
from keystrata.storage.models import LedgerCheckpoint, NodeMeta
from keystrata.storage.sealed import meta_context

#: The extension line's marker: format version 2 of the signed text (version 1: none).
TIME_LINE_MARKER = "keystrata/v2 signed-at"


def signed_text(origin: str, size: int, root: bytes, signed_at: datetime) -> str:
    """Return the text a checkpoint signs (format version 2, see the module docstring)."""
    body = f"{origin}\n{size}\n{base64.b64encode(root).decode()}\n"
    return body + f"{TIME_LINE_MARKER} {timestamp(signed_at.astimezone(UTC))}\n"


def _signing_key(ctx: NodeContext) -> bytes:
    with ctx.db.read() as s:
        sealed = s.execute(
            select(NodeMeta.value).where(NodeMeta.name == "ledger_signing_key")
        ).scalar_one()
    return ctx.keyring.open(sealed, meta_context("ledger_signing_key"))


def public_key(ctx: NodeContext) -> bytes:
    """The raw 32-byte Ed25519 public key checkpoints verify under."""
    return public_key_of(_signing_key(ctx))


@dataclass(frozen=True)
class Checkpoint:
    origin: str
    tree_size: int
    root_hash: bytes
    signed_text: str
    signature: bytes
    signed_at: datetime

    def to_json(self, public: bytes) -> dict[str, Any]:
        return {
            "origin": self.origin,
            "tree_size": self.tree_size,
            "root_hash": base64.b64encode(self.root_hash).decode(),
            "signed_text": self.signed_text,
            "signature": base64.b64encode(self.signature).decode(),
            "public_key": base64.b64encode(public).decode(),
            "signed_at": self.signed_at.isoformat(),
        }


def _from_row(ctx: NodeContext, row: LedgerCheckpoint) -> Checkpoint:
    return Checkpoint(
        ctx.node_id, row.tree_size, row.root_hash, row.signed_text, row.signature, row.signed_at
    )


def sign_now(ctx: NodeContext, *, force: bool = False) -> Checkpoint | None:
    """Sign the current tree head if it is due (or ``force``) and has new entries.

    Returns the new checkpoint, or None when nothing was due.
    """
    cfg = ctx.settings.ledger
    key = _signing_key(ctx)
    now = ctx.clock.now()
    with ctx.db.write() as s:
        size, root = StoredTree(s).head()
        last = s.execute(
            select(LedgerCheckpoint).order_by(LedgerCheckpoint.tree_size.desc()).limit(1)
        ).scalar()
        if last is not None and last.tree_size >= size:
            return None
        due = (
            force
            or last is None
            or size - last.tree_size >= cfg.checkpoint_entries
            or now - last.signed_at >= timedelta(seconds=cfg.checkpoint_seconds)
        )
        if not due or size == 0:
            return None
        text = signed_text(ctx.node_id, size, root, now)
        row = LedgerCheckpoint(
            tree_size=size,
            root_hash=root,
            signed_text=text,
            signature=sign(key, text.encode()),
            signed_at=now,
        )
        s.add(row)
        return _from_row(ctx, row)


def latest(ctx: NodeContext) -> Checkpoint | None:
    with ctx.db.read() as s:
        row = s.execute(
            select(LedgerCheckpoint).order_by(LedgerCheckpoint.tree_size.desc()).limit(1)
        ).scalar()
        return None if row is None else _from_row(ctx, row)


def history(ctx: NodeContext, *, limit: int = 100, before: int | None = None) -> list[Checkpoint]:
    """Checkpoints, newest first; ``before`` pages back by tree size."""
    with ctx.db.read() as s:
        q = select(LedgerCheckpoint).order_by(LedgerCheckpoint.tree_size.desc()).limit(limit)
        if before is not None:
            q = q.where(LedgerCheckpoint.tree_size < before)
        return [_from_row(ctx, r) for r in s.execute(q).scalars()]
