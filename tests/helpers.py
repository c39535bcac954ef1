"""Small helpers shared by tests."""

from __future__ import annotations

import base64
import hashlib
import os
import pty
import subprocess
from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import select, text

from keystrata.context import NodeContext
from keystrata.loopback.processes import KEYSTRATA
from keystrata.storage.db import Database
from keystrata.storage.models import Base, LedgerEntry, LinkBlock
from keystrata.storage.sealed import block_context


def snapshot(ctx: NodeContext) -> dict[str, list[tuple[Any, ...]]]:
    """Every row of every table, for "this request changed nothing" checks."""
    out: dict[str, list[tuple[Any, ...]]] = {}
    with ctx.db.read() as s:
        for table in Base.metadata.sorted_tables:
            rows = s.execute(select(table)).all()
            out[table.name] = sorted(tuple(r) for r in rows)
    return out


def ledger_events(ctx: NodeContext) -> list[str]:
    with ctx.db.read() as s:
        return list(s.execute(select(LedgerEntry.event).order_by(LedgerEntry.idx)).scalars())


def ledger_entries(db: Database) -> list[bytes]:
    """The ledger's entries (their canonical bytes), in order."""
    with db.read() as s:
        return list(s.execute(select(LedgerEntry.entry).order_by(LedgerEntry.idx)).scalars())


def mth(entries: list[bytes]) -> bytes:
    """RFC 9162 section 2.1.1 Merkle Tree Hash, straight from the definition."""
    if not entries:
        return hashlib.sha256(b"").digest()
    if len(entries) == 1:
        return hashlib.sha256(b"\x00" + entries[0]).digest()
    k = 1
    while k * 2 < len(entries):
        k *= 2
    return hashlib.sha256(b"\x01" + mth(entries[:k]) + mth(entries[k:])).digest()


def decoded_keys(answer: dict[str, Any]) -> dict[str, bytes]:
    """Key ID -> key bytes of an ETSI Key container."""
    # RFC 4648 section 4 Base64, strictly decoded.
    return {k["key_ID"]: base64.b64decode(k["key"], validate=True) for k in answer["keys"]}


def link_bytes(node: Any, ranges: list[dict[str, int | str]]) -> bytes:
    """The named link key bytes as a node holds them (read before they are used)."""
    out = b""
    with node.ctx.db.read() as s:
        for r in ranges:
            row = s.execute(select(LinkBlock).where(LinkBlock.block_id == r["block"])).scalar_one()
            rest = node.ctx.keyring.open(
                row.sealed, block_context(row.link_id, row.block_id, row.used)
            )
            start = int(r["offset"]) - row.used
            out += rest[start : start + int(r["length"])]
    return out


def break_ledger(node: Any) -> None:
    """Make every new ledger entry fail to be written, as a full disk or a revoked
    grant would (a trigger that refuses inserts, on each backend)."""
    with node.ctx.db.write() as s:
        if node.ctx.db.backend == "sqlite":
            s.execute(
                text(
                    "CREATE TRIGGER ledger_refuses BEFORE INSERT ON ledger_entry "
                    "BEGIN SELECT RAISE(ABORT, 'ledger is read-only'); END"
                )
            )
        else:
            s.execute(
                text(
                    "CREATE FUNCTION ledger_refuses() RETURNS trigger AS $$ BEGIN "
                    "RAISE EXCEPTION 'ledger is read-only'; END $$ LANGUAGE plpgsql"
                )
            )
            s.execute(
                text(
                    "CREATE TRIGGER ledger_refuses BEFORE INSERT ON ledger_entry "
                    "FOR EACH ROW EXECUTE FUNCTION ledger_refuses()"
                )
            )


class SteppedClock:
    """A clock the test moves on by hand (starting at the time it is given)."""

    def __init__(self, start: datetime) -> None:
        self.at = start

    def now(self) -> datetime:
        return self.at

    def advance(self, seconds: float) -> None:
        self.at += timedelta(seconds=seconds)


def on_a_terminal(args: list[str], env: dict[str, str] | None = None) -> str:
    """Run ``keystrata ARGS`` with stdout and stderr on a pseudo-terminal, as a person
    at a terminal would; return all it wrote there (it must exit 0)."""
    main, child = pty.openpty()
    proc = subprocess.Popen(
        [*KEYSTRATA, *args], stdout=child, stderr=child, env={**os.environ, **(env or {})}
    )
    os.close(child)
    out = b""
    while True:
        try:
            chunk = os.read(main, 4096)
        except OSError:  # EIO: the child closed the terminal
            break
        if not chunk:
            break
        out += chunk
    assert proc.wait(timeout=120) == 0, out
    os.close(main)
    return out.decode(errors="replace")
