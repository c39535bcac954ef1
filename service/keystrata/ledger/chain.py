"""Appending to the ledger inside the caller's transaction (fail closed: if the entry
cannot be written, the transaction, and so the change it records, is rolled back)."""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from datetime import datetime
from typing import Any

from sqlalchemy import exc, insert, select, update
from sqlalchemy.orm import Session

from keystrata.errors import Unavailable
from keystrata.ledger import merkle
from keystrata.ledger.entries import Event, encode_entry, references
from keystrata.ledger.frontier import Frontier
from keystrata.storage.models import LedgerEntry, LedgerHead, LedgerNode, LedgerRef


def append(
    session: Session, *, node_id: str, at: datetime, event: Event, fields: Mapping[str, Any]
) -> int:
    """Append one entry in the session's transaction and return its index.

    The entry names the previous entry's leaf hash (``prev``, read from the stored
    tree) and its searchable references go to ``ledger_ref``. The single ``ledger_head``
    row is locked until commit, so concurrent appenders get consecutive indexes with no
    gaps. The entry's Merkle leaf and every perfect subtree it completes (RFC 9162
    section 2.1) are written in the same transaction.

    Raises:
        Unavailable: the ledger cannot be written. The caller's transaction then rolls
            back, so the change the entry records does not happen either (fail closed).
    """
    return append_many(session, node_id=node_id, entries=[(at, event, fields)])[0]


def append_many(
    session: Session, *, node_id: str, entries: Sequence[tuple[datetime, Event, Mapping[str, Any]]]
) -> list[int]:
    """Append several entries, in order, in the session's transaction (one read of the
    head and one insert per table for all of them); return their indexes.

    Raises:
        Unavailable: as :func:`append`; none of the entries is written.
    """
    if not entries:
        return []
    try:
        return _append(session, node_id=node_id, entries=entries)
    except (
        exc.IntegrityError,
        exc.OperationalError,
        exc.ProgrammingError,
        exc.InternalError,
    ) as err:
        raise Unavailable("the audit ledger cannot be written; nothing was changed") from err


def _append(
    session: Session,
    *,
    node_id: str,
    entries: Sequence[tuple[datetime, Event, Mapping[str, Any]]],
) -> list[int]:
    # The row lock (and SQLite's write lock) serialises appenders until commit.
    first, frontier = session.execute(
        select(LedgerHead.size, LedgerHead.frontier).where(LedgerHead.id == 1).with_for_update()
    ).one()
    prev = None if first == 0 else StoredTree(session).get(0, first - 1)
    rows, leaves, refs = [], [], []
    for index, (at, event, fields) in enumerate(entries, start=first):
        entry = encode_entry(
            index=index, event=event, node_id=node_id, at=at, fields=fields, prev=prev
        )
        prev = merkle.leaf_hash(entry)
        leaves.append(prev)
        rows.append({"idx": index, "recorded_at": at, "event": str(event), "entry": entry})
        refs += [{"kind": str(k), "value": v, "idx": index} for k, v in references(fields)]
    edge = Frontier(first, frontier)
    nodes = merkle.append(edge, first, leaves)
    size = first + len(entries)
    session.execute(
        update(LedgerHead)
        .where(LedgerHead.id == 1)
        .values(size=size, frontier=edge.advance(nodes, size))
    )
    session.execute(insert(LedgerEntry), rows)
    session.execute(
        insert(LedgerNode), [{"level": lv, "idx": ix, "hash": h} for lv, ix, h in nodes]
    )
    if refs:
        session.execute(insert(LedgerRef), refs)
    return list(range(first, size))


class StoredTree:
    """The ledger's Merkle tree as stored: perfect subtrees in ``ledger_node``."""

    def __init__(self, session: Session) -> None:
        self.session = session

    def get(self, level: int, index: int) -> bytes:
        row = self.session.get(LedgerNode, (level, index))
        if row is None:
            raise KeyError((level, index))
        return row.hash

    def head(self) -> tuple[int, bytes]:
        """(size, root hash) of the whole ledger, from the stored right edge."""
        size, frontier = self.session.execute(
            select(LedgerHead.size, LedgerHead.frontier).where(LedgerHead.id == 1)
        ).one()
        return int(size), merkle.root(Frontier(int(size), frontier), int(size))

    def inclusion_proof(self, index: int, size: int) -> list[bytes]:
        return self._prefetched(lambda store: merkle.inclusion_proof(store, index, size))

    def consistency_proof(self, old_size: int, new_size: int) -> list[bytes]:
        return self._prefetched(lambda store: merkle.consistency_proof(store, old_size, new_size))

    def _prefetched(self, proof: Callable[[merkle.SubtreeStore], list[bytes]]) -> list[bytes]:
        """Compute a proof with one query: which subtrees a proof reads depends on the
        sizes only, so a first walk records them, one query reads them, and a second
        walk computes the proof from those."""
        wanted: list[tuple[int, int]] = []
        proof(_Recorder(wanted))
        found: dict[tuple[int, int], bytes] = {}
        if wanted:
            rows = _read_subtrees(self.session, set(wanted))
            found = {(int(lv), int(ix)): bytes(h) for lv, ix, h in rows}
        return proof(_Found(found))


def _read_subtrees(session: Session, wanted: set[tuple[int, int]]) -> list[Any]:
    """Rows (level, idx, hash) of ``wanted`` in one statement: one term per level,
    ``level = ? AND idx IN (...)``, which both databases answer from the primary key (a
    row-value IN made SQLite scan the table). Written as driver SQL: building the same
    statement as a SQLAlchemy expression cost more than running it."""
    by_level: dict[int, list[int]] = {}
    for level, index in sorted(wanted):
        by_level.setdefault(level, []).append(index)
    conn = session.connection()
    mark = "?" if conn.dialect.paramstyle == "qmark" else "%s"
    terms, params = [], []
    for level, indexes in by_level.items():
        terms.append(f"(level = {mark} AND idx IN ({', '.join([mark] * len(indexes))}))")
        params += [level, *indexes]
    # Only placeholders are formatted into the text; every value is a parameter.
    sql = "SELECT level, idx, hash FROM ledger_node WHERE " + " OR ".join(terms)  # noqa: S608
    return list(conn.exec_driver_sql(sql, tuple(params)).all())


class _Recorder:
    def __init__(self, wanted: list[tuple[int, int]]) -> None:
        self.wanted = wanted

    def get(self, level: int, index: int) -> bytes:
        self.wanted.append((level, index))
        return bytes(merkle.HASH_SIZE)


class _Found:
    def __init__(self, found: dict[tuple[int, int], bytes]) -> None:
        self.found = found

    def get(self, level: int, index: int) -> bytes:
        return self.found[(level, index)]  # KeyError: not stored, as SubtreeStore says
