"""Engines and transactions for SQLite (embedded default) and PostgreSQL (psycopg 3).

SQLite is opened in WAL mode with ``secure_delete`` (freed pages are zeroed, so destroyed
key material does not linger in the file) and foreign keys on. The ``sqlite3`` module of
Python 3.11 does not begin a transaction for a SELECT, so a select-then-update in two
statements could hand one row to two workers. We therefore take SQLite's write lock at
the start of every write transaction (``BEGIN IMMEDIATE``); read transactions use a plain
deferred ``BEGIN`` so they never wait for writers.

Threads of one process that want to write on SQLite first queue on a lock of their own
(:attr:`Database.write_gate`): SQLite's busy handler would otherwise let them sleep and
retry with growing pauses, so that a writer that has waited long retries rarely and
newcomers overtake it (seconds of tail latency under load).
"""

from __future__ import annotations

import threading
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Engine, create_engine, event, exc
from sqlalchemy.engine import URL, make_url
from sqlalchemy.orm import Session, sessionmaker

from keystrata.errors import InvalidInput, TransactionConflict, Unavailable

_WRITE = "keystrata_write"
#: PostgreSQL SQLSTATEs of a transaction the server ended to resolve a conflict
#: (postgresql.org, "PostgreSQL Error Codes"): deadlock_detected, serialization_failure.
CONFLICT_STATES = frozenset({"40P01", "40001"})
#: How long a writer waits for its turn before the database counts as unavailable (the
#: same as SQLite's busy timeout below).
WRITE_WAIT_SECONDS = 30.0


def normalise_url(url: str) -> URL:
    """Return the SQLAlchemy URL with the driver we support for each backend."""
    parsed = make_url(url)
    if parsed.get_backend_name() == "postgresql":
        return parsed.set(drivername="postgresql+psycopg")
    if parsed.get_backend_name() == "sqlite":
        return parsed.set(drivername="sqlite+pysqlite")
    raise ValueError(f"unsupported database backend {parsed.get_backend_name()!r}")


def make_engine(url: str, *, sqlite_synchronous: str = "FULL", pool_size: int = 10) -> Engine:
    """Create an engine with the pragmas and transaction behaviour described above."""
    parsed = normalise_url(url)
    if parsed.get_backend_name() == "sqlite":
        engine = create_engine(
            parsed,
            connect_args={"check_same_thread": False, "timeout": 30},
            pool_size=pool_size,
            max_overflow=pool_size,
            hide_parameters=True,  # see below
        )
        _install_sqlite_hooks(engine, sqlite_synchronous)
        return engine
    return create_engine(
        parsed,
        pool_size=pool_size,
        max_overflow=pool_size,
        pool_pre_ping=True,
        connect_args={"connect_timeout": 5},
        # Statement parameters stay out of SQLAlchemy's log lines and exception text:
        # they hold what clients put in paths and queries (a key, by mistake or on
        # purpose) and sealed values.
        hide_parameters=True,
    )


def _install_sqlite_hooks(engine: Engine, synchronous: str) -> None:
    if synchronous not in ("FULL", "NORMAL"):
        raise ValueError("sqlite synchronous must be FULL or NORMAL")

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn: Any, _record: Any) -> None:
        # Let SQLAlchemy's "begin" hook below issue BEGIN, not the sqlite3 module.
        dbapi_conn.isolation_level = None
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute(f"PRAGMA synchronous={synchronous}")
        cur.execute("PRAGMA foreign_keys=ON")
        cur.execute("PRAGMA secure_delete=ON")
        cur.execute("PRAGMA busy_timeout=30000")
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn: Any) -> None:
        if conn.get_execution_options().get(_WRITE):
            conn.exec_driver_sql("BEGIN IMMEDIATE")
        else:
            conn.exec_driver_sql("BEGIN")


#: SQLite ``PRAGMA synchronous`` answers a number: 0 OFF, 1 NORMAL, 2 FULL, 3 EXTRA
#: (sqlite.org, "PRAGMA synchronous"). In WAL mode NORMAL survives a process crash but
#: a power loss can roll back the last commits; FULL and EXTRA do not.
_SQLITE_SYNC_NAMES = {0: "OFF", 1: "NORMAL", 2: "FULL", 3: "EXTRA"}


@dataclass(frozen=True)
class DurabilityRisk:
    """A database setting in force that lets a power loss undo committed transactions."""

    setting: str  # fixed words: sqlite_synchronous, synchronous_commit, fsync, full_page_writes
    value: str
    fix: str


def durability_risks(engine: Engine) -> list[DurabilityRisk]:
    """Read the settings in force on a new connection and return those that can lose a
    committed transaction on power loss (empty when the database is durable).

    PostgreSQL (postgresql.org, "Write Ahead Log" settings): ``fsync = off`` and
    ``full_page_writes = off`` can lose or corrupt committed data on a crash of the
    machine; ``synchronous_commit = off`` acknowledges commits before their WAL is on
    disk. ``local``, ``remote_write``, ``on`` and ``remote_apply`` all flush locally.

    Raises:
        Unavailable: the database cannot be reached.
    """
    risks: list[DurabilityRisk] = []
    with _translate_db_errors(), engine.connect() as conn:
        if engine.dialect.name == "sqlite":
            level = int(conn.exec_driver_sql("PRAGMA synchronous").scalar_one())
            if level < 2:
                risks.append(
                    DurabilityRisk(
                        "sqlite_synchronous",
                        _SQLITE_SYNC_NAMES.get(level, str(level)),
                        'set [database] sqlite_synchronous = "FULL"',
                    )
                )
            return risks
        for name, unsafe in (
            ("synchronous_commit", "off"),
            ("fsync", "off"),
            ("full_page_writes", "off"),
        ):
            value = str(conn.exec_driver_sql(f"SHOW {name}").scalar_one())
            if value.lower() == unsafe:
                risks.append(
                    DurabilityRisk(
                        name,
                        value,
                        f"set {name} = on in postgresql.conf, or `ALTER DATABASE ... RESET "
                        f"{name}` / `ALTER ROLE ... RESET {name}` where it was turned off",
                    )
                )
    return risks


def upsert_insert(backend: str) -> Any:
    """The ``insert`` construct of ``backend``'s dialect, which has ``ON CONFLICT``;
    imported on first use, as the PostgreSQL dialect (about 2 MiB) is nothing a SQLite
    node needs."""
    if backend == "postgresql":
        from sqlalchemy.dialects.postgresql import insert as pg_insert

        return pg_insert
    from sqlalchemy.dialects.sqlite import insert as sqlite_insert

    return sqlite_insert


class Database:
    """One node's database: an engine and the two kinds of transaction it offers."""

    def __init__(self, engine: Engine) -> None:
        self.engine = engine
        self.backend = engine.dialect.name
        self._writer = sessionmaker(
            bind=engine.execution_options(**{_WRITE: True}), expire_on_commit=False
        )
        self._reader = sessionmaker(bind=engine, expire_on_commit=False)
        # Re-entrant: a writer that (wrongly) nests a write would deadlock on SQLite's
        # own lock anyway; this gate must not add a second way to hang.
        self.write_gate = threading.RLock() if self.backend == "sqlite" else None

    @classmethod
    def from_url(cls, url: str, **kw: Any) -> Database:
        return cls(make_engine(url, **kw))

    @contextmanager
    def write(self) -> Iterator[Session]:
        """Yield a session in a write transaction; commit on success, roll back on error.

        Raises:
            Unavailable: the database cannot be reached or is locked for too long.
        """
        gate = self.write_gate
        if gate is None:
            with _translate_db_errors(), self._writer() as session, session.begin():
                yield session
            return
        if not gate.acquire(timeout=WRITE_WAIT_SECONDS):
            raise Unavailable("the database is busy; try again later")
        try:
            with _translate_db_errors(), self._writer() as session, session.begin():
                yield session
        finally:
            gate.release()

    @contextmanager
    def read(self) -> Iterator[Session]:
        """Yield a session for reading; whatever it wrote is rolled back."""
        with _translate_db_errors(), self._reader() as session:
            # Closing the session rolls back its transaction.
            yield session

    def peek(self, sql: str) -> Any:
        """The one value of a fixed, parameterless statement, read on a pooled driver
        connection without a session: the cheapest read there is (about 20 us on SQLite,
        one round trip and the pool's ping on PostgreSQL), for counters read per request.

        Raises:
            Unavailable: the database cannot be reached.
        """
        driver_error = self.engine.dialect.loaded_dbapi.Error
        try:
            with _translate_db_errors():
                conn = self.engine.raw_connection()
        except driver_error as err:  # the pool hands the driver's own error through
            raise Unavailable("the database is not available; try again later") from err
        try:
            cursor = conn.cursor()
            try:
                cursor.execute(sql)
                row = cursor.fetchone()
            finally:
                cursor.close()
            conn.rollback()
        except driver_error as err:
            conn.invalidate()  # a connection that failed is not handed out again
            raise Unavailable("the database is not available; try again later") from err
        finally:
            conn.close()
        if row is None:
            raise Unavailable("the database holds no value for a counter it must have")
        return row[0]

    def dispose(self) -> None:
        self.engine.dispose()


@contextmanager
def _translate_db_errors() -> Iterator[None]:
    try:
        yield
    except exc.OperationalError as err:
        if getattr(err.orig, "sqlstate", None) in CONFLICT_STATES:
            raise TransactionConflict() from err
        # Connection refused, server gone, database locked past the busy timeout.
        raise Unavailable("the database is not available; try again later") from err
    except exc.InterfaceError as err:
        raise Unavailable("the database is not available; try again later") from err
    except exc.DataError as err:
        # A value the database cannot hold (PostgreSQL: a NUL character in text, a number
        # out of range) came from the request: refuse it without naming it.
        raise InvalidInput("a value in the request cannot be stored or compared") from err
