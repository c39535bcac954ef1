"""Appending to the ledger inside the caller's transaction (fail closed: if the entry
cannot be written, the transaction, and so the change it records, is rolled back)."""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import Connection, exc, select
from sqlalchemy.orm import Session

from keystrata.errors import TransactionConflict, Unavailable
from keystrata.ledger import merkle
from keystrata.ledger.entries import Event, Prepared, prepare, references
from keystrata.ledger.frontier import Frontier
from keystrata.storage.db import CONFLICT_STATES
from keystrata.storage.models import LedgerEntry, LedgerHead


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
    """Append several entries, in order, in the session's transaction; return their
    indexes.

    Everything that does not depend on the ledger head (the entries' canonical bytes
    but for ``index`` and ``prev``, their references) is done first; then one read
    takes the head (and, on PostgreSQL, its row lock, held to commit), and the entries,
    the Merkle nodes, the references and the new head are written with one statement
    per table on SQLite and one statement in all on PostgreSQL.

    Inside :func:`deferred` the entries are kept and written when it ends, and the
    indexes returned are -1.

    Raises:
        Unavailable: as :func:`append`; none of the entries is written.
    """
    if not entries:
        return []
    held: Deferred | None = session.info.get(_DEFERRED)
    if held is not None:
        held.entries.extend(entries)
        return [-1] * len(entries)
    prepared = [
        (at, str(event), prepare(event=event, node_id=node_id, at=at, fields=fields))
        for at, event, fields in entries
    ]
    refs = [[(str(k), v) for k, v in references(fields)] for _, _, fields in entries]
    try:
        # The caller's pending changes go first, as an ORM statement would autoflush
        # them, so that they are not written while the head is held.
        session.flush()
        conn = session.connection()
        sql = _statements(conn)
        # recorded_at as the column type binds it (UTC; a naive time raises ValueError).
        ready = [(sql.when(at), event, entry) for at, event, entry in prepared]
        with _cursor(conn) as cur:
            return _append(cur, sql, ready, refs)
    except (
        exc.IntegrityError,
        exc.OperationalError,
        exc.ProgrammingError,
        exc.InternalError,
    ) as err:
        if getattr(err.orig, "sqlstate", None) in CONFLICT_STATES:
            raise TransactionConflict() from err  # a deadlock broken: may run again
        raise Unavailable("the audit ledger cannot be written; nothing was changed") from err


_DEFERRED = "keystrata.ledger.deferred"


@dataclass
class Deferred:
    """Entries appended inside :func:`deferred`, not yet written."""

    entries: list[tuple[datetime, Event, Mapping[str, Any]]]

    def mark(self) -> int:
        """A point to come back to (before a savepoint that may roll back)."""
        return len(self.entries)

    def back_to(self, mark: int) -> None:
        """Forget the entries appended since ``mark`` (their savepoint rolled back)."""
        del self.entries[mark:]


@contextmanager
def deferred(session: Session, *, node_id: str) -> Iterator[Deferred]:
    """Keep the entries appended in the block and write them, in order, when it ends.

    For a transaction that applies several changes one after the other (a run of peer
    messages, each in a savepoint): appended at once, the first change's entry would
    take the ledger head, held to commit, while the later changes lock their rows, and
    a transaction that locked one of those rows first and then appends would wait for
    the head while holding it (a deadlock on PostgreSQL). Written at the end, the head is
    the last lock the transaction takes. A change whose savepoint rolls back must drop
    its entries with :meth:`Deferred.back_to`. The entries still commit with the
    changes they record; an error in the block writes none of them.
    """
    if _DEFERRED in session.info:
        raise RuntimeError("ledger appends are deferred already in this session")
    held = Deferred([])
    session.info[_DEFERRED] = held
    try:
        yield held
    finally:
        del session.info[_DEFERRED]
    append_many(session, node_id=node_id, entries=held.entries)


@contextmanager
def _cursor(conn: Connection) -> Iterator[Any]:
    """A DBAPI cursor on the session's connection (in its transaction). Each statement
    through SQLAlchemy's ``exec_driver_sql`` cost about 35 microseconds of its own here,
    the driver's cursor about 1; driver errors are wrapped as SQLAlchemy wraps them
    (``IntegrityError``, ``OperationalError``, ...), so callers see the same errors,
    and a lost connection is invalidated as SQLAlchemy would."""
    dialect = conn.dialect
    dbapi = dialect.loaded_dbapi
    raw = conn.connection
    cur = raw.cursor()
    try:
        yield cur
    except dbapi.Error as err:
        lost = dialect.is_disconnect(err, raw.dbapi_connection, cur)
        if lost:
            conn.invalidate(err)
        raise exc.DBAPIError.instance(
            None, None, err, dbapi.Error, hide_parameters=True, dialect=dialect,
            connection_invalidated=lost,
        ) from err  # fmt: skip
    finally:
        if raw.is_valid:
            cur.close()


def _append(
    cur: Any,
    sql: _Sql,
    prepared: list[tuple[Any, str, Prepared]],
    refs: list[list[tuple[str, str]]],
) -> list[int]:
    # From here to commit the head is ours: SQLite's write lock was taken at BEGIN
    # IMMEDIATE; on PostgreSQL this statement locks the row (FOR UPDATE).
    cur.execute(sql.head)
    first, frontier = cur.fetchone()
    first = int(first)
    prev = None if first == 0 else _last_leaf(cur, sql, first, frontier)
    rows, leaves, ref_rows = [], [], []
    for index, (at, event, entry) in enumerate(prepared, start=first):
        raw = entry.at(index, prev)
        prev = merkle.leaf_hash(raw)
        leaves.append(prev)
        rows.append((index, at, event, raw))
        ref_rows += [(kind, value, index) for kind, value in refs[index - first]]
    edge = Frontier(first, frontier)
    nodes = merkle.append(edge, first, leaves)
    size = first + len(rows)
    new_frontier = edge.advance(nodes, size)
    sql.write(cur, rows, nodes, ref_rows, (size, new_frontier))
    _remember(size, new_frontier, leaves[-1])
    return list(range(first, size))


# ---------------------------------------------------------------- the previous leaf

#: (size, stored frontier) -> leaf hash of entry ``size - 1``, as this process wrote it.
#: The frontier's last subtree covers that leaf, so a head with the same size and
#: frontier has the same last leaf (SHA-256 collision resistance, RFC 9162 section 2.1):
#: the cache is safe across databases and rollbacks, and saves a read per append while
#: this process is the one appending.
_LAST_LEAF: dict[tuple[int, bytes], bytes] = {}
_LAST_LEAF_MAX = 64
_LAST_LEAF_LOCK = threading.Lock()


def _remember(size: int, frontier: bytes, leaf: bytes) -> None:
    with _LAST_LEAF_LOCK:
        if len(_LAST_LEAF) >= _LAST_LEAF_MAX:
            _LAST_LEAF.clear()
        _LAST_LEAF[(size, frontier)] = leaf


def _last_leaf(cur: Any, sql: _Sql, size: int, frontier: bytes | None) -> bytes:
    stored = bytes(frontier or b"")
    if size & 1:  # the right edge ends with the leaf itself, H(0, size - 1)
        return stored[-merkle.HASH_SIZE :]
    known = _LAST_LEAF.get((size, stored))
    if known is not None:
        return known
    cur.execute(sql.leaf, (size - 1,))
    row = cur.fetchone()
    if row is None:
        raise KeyError((0, size - 1))
    return bytes(row[0])


# ---------------------------------------------------------------- statements


@dataclass(frozen=True)
class _Sql:
    """The append's statements for one database dialect, as driver SQL: built once,
    never compiled per call."""

    head: str
    leaf: str
    when: Callable[[datetime], Any]  # recorded_at as SQLAlchemy's DateTime binds it
    write: Callable[[Any, list[Any], list[Any], list[Any], tuple[int, bytes]], None]


_SQL: dict[str, _Sql] = {}


def _statements(conn: Connection) -> _Sql:
    dialect = conn.dialect
    found = _SQL.get(dialect.name)
    if found is None:
        column = LedgerEntry.__table__.c.recorded_at.type
        bind = column.dialect_impl(dialect).bind_processor(dialect)
        when: Callable[[datetime], Any] = bind if bind is not None else _same
        if dialect.name == "postgresql":
            found = _Sql(_HEAD + " FOR UPDATE", _LEAF.replace("?", "%s"), when, _write_postgresql)
        else:
            found = _Sql(_HEAD, _LEAF, when, _write_sqlite)
        _SQL[dialect.name] = found
    return found


def _same(at: datetime) -> datetime:
    return at


_HEAD = "SELECT size, frontier FROM ledger_head WHERE id = 1"
_LEAF = "SELECT hash FROM ledger_node WHERE level = 0 AND idx = ?"
_INSERT_ENTRY = "INSERT INTO ledger_entry (idx, recorded_at, event, entry) VALUES "
_INSERT_NODE = "INSERT INTO ledger_node (level, idx, hash) VALUES "
_INSERT_REF = "INSERT INTO ledger_ref (kind, value, idx) VALUES "
_UPDATE_HEAD = "UPDATE ledger_head SET size = ?, frontier = ? WHERE id = 1"


def _write_sqlite(
    cur: Any,
    rows: list[Any],
    nodes: list[Any],
    refs: list[Any],
    head: tuple[int, bytes],
) -> None:
    """SQLite runs in process: one prepared statement per table, run for every row."""
    cur.executemany(_INSERT_ENTRY + "(?, ?, ?, ?)", rows)
    cur.executemany(_INSERT_NODE + "(?, ?, ?)", nodes)
    if refs:
        cur.executemany(_INSERT_REF + "(?, ?, ?)", refs)
    cur.execute(_UPDATE_HEAD, head)


def _write_postgresql(
    cur: Any,
    rows: list[Any],
    nodes: list[Any],
    refs: list[Any],
    head: tuple[int, bytes],
) -> None:
    """One round trip, one statement of constant text (so psycopg prepares it once):
    the inserts are data-modifying WITH queries of the head update (PostgreSQL
    documentation, "WITH Queries", section 7.8.4), each row set passed as one array per
    column and expanded by ``unnest``. The casts are the columns' own types (the
    timestamps arrive UTC-aware from the column's bind processing, as timestamptz)."""
    columns = (*_columns(rows, 4), *_columns(nodes, 3), *_columns(refs, 3))
    cur.execute(_PG_WRITE, (*columns, *head))


def _columns(table: list[Any], width: int) -> list[list[Any]]:
    """The rows' columns as lists: psycopg sends a list as an array (a tuple would be
    a record)."""
    return [list(c) for c in zip(*table, strict=True)] if table else [[] for _ in range(width)]


#: Constant text: only placeholders, every value is a parameter.
_PG_WRITE = (
    "WITH e AS (INSERT INTO ledger_entry (idx, recorded_at, event, entry)"
    " SELECT * FROM unnest(%s::bigint[], %s::timestamptz[], %s::text[], %s::bytea[])),"
    " n AS (INSERT INTO ledger_node (level, idx, hash)"
    " SELECT * FROM unnest(%s::integer[], %s::bigint[], %s::bytea[])),"
    " r AS (INSERT INTO ledger_ref (kind, value, idx)"
    " SELECT * FROM unnest(%s::text[], %s::text[], %s::bigint[]))"
    " UPDATE ledger_head SET size = %s, frontier = %s WHERE id = 1"
)


class StoredTree:
    """The ledger's Merkle tree as stored: perfect subtrees in ``ledger_node``."""

    def __init__(self, session: Session) -> None:
        self.session = session

    def get(self, level: int, index: int) -> bytes:
        rows = _read_subtrees(self.session, {(level, index)})
        if not rows:
            raise KeyError((level, index))
        return bytes(rows[0][2])

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
