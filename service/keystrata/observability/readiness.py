"""Readiness: can this node do its job right now? Three cheap checks, each bounded in time.

- ``database``: a SELECT of this node's identity row answers, and names this node.
- ``kek``: the key-encryption key in memory opens the database's KEK check value (the
  same check start-up runs), so sealed rows can be read and written.
- ``ledger``: the ledger can be written, tested without writing an entry: in one
  transaction that is always rolled back, lock the ``ledger_head`` row (on SQLite: take
  the write lock) and insert a probe row into ``ledger_entry``, so a trigger, a revoked
  grant or a lock held too long shows up the way it would for a real append. Waiting
  for the lock is bounded (SQLite ``busy_timeout``, PostgreSQL ``lock_timeout``).

- ``durability`` (advisory): the database settings in force cannot lose a committed
  transaction on power loss. With ``[database] accept_data_loss_on_power_failure`` the
  node runs anyway and the check reads ``overridden: <settings>``; readiness stays 200,
  because the operator chose it and a failing readiness would only make an orchestrator
  restart the node into the same settings (or take every pair out of service). An unsafe
  setting without the override (changed while the node runs) fails the check.
- ``pairs`` (advisory): pairs held by the restore check (restore/holds.py) are
  named; readiness stays 200, since the node still serves its other pairs and a
  restart does not resolve a hold (an operator does).
- ``links`` (advisory): links whose observed key rate over a whole rate window is far
  below the link model's plan for now (supply/observed.py) are named with their share
  of the plan: clouds, pointing trouble or a stopped QKD module. Readiness stays 200;
  the node serves what key it has and a restart fixes none of these.
- ``registry`` (advisory): peers whose shared registry facts differ from this node's
  (node/registry_watch.py) are named with the facts, names only (``disagrees with
  relay-1 on pair pair-ab policy.priority``), and peers not compared yet or whose last
  attempt got no answer. Readiness stays 200: which side is right is an operator's call.

Problems are reported in fixed words of our own, never with the database's error text.
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass

from sqlalchemy import insert, select, text, update
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import Session

from keystrata.context import NodeContext
from keystrata.errors import KeystrataError
from keystrata.node import registry_watch
from keystrata.node.lifecycle import check_kek, describe_risks
from keystrata.restore import holds
from keystrata.storage.db import durability_risks
from keystrata.storage.models import LedgerEntry, LedgerHead, NodeMeta
from keystrata.supply import observed

log = logging.getLogger("keystrata.readiness")

#: Longest wait for a lock (or, on PostgreSQL, for one statement) during a check.
LOCK_WAIT_MS = 2000
STATEMENT_MS = 4000
OK = "ok"
UNREACHABLE = "unreachable"
NOT_CHECKED = "not checked: the database is unavailable"
PROBE_EVENT = "readiness.probe"
#: An advisory check that is not ``ok`` starts with one of these; readiness stays true.
OVERRIDDEN = "overridden: "
HELD = "held: "
BELOW_PLAN = "below plan: "
DISAGREES = "disagrees with "
NOT_COMPARED = "not compared with "
ADVISORY = ("durability", "pairs", "links", "registry")


class NotReady(Exception):
    """A check failed; the message is one of the fixed problems below."""


@dataclass(frozen=True)
class Readiness:
    """Each check's result: ``"ok"`` or a short description of the problem."""

    checks: dict[str, str]

    @property
    def ready(self) -> bool:
        return not self.failing

    @property
    def failing(self) -> list[str]:
        return [name for name, v in self.checks.items() if not _passes(name, v)]


def _passes(name: str, value: str) -> bool:
    if value == OK:
        return True
    return name in ADVISORY and value.startswith(
        (OVERRIDDEN, HELD, BELOW_PLAN, DISAGREES, NOT_COMPARED)
    )


def assess(ctx: NodeContext) -> Readiness:
    """Run the checks in order; later ones are skipped when the database is down."""
    checks = {"database": _run("database", lambda: _database(ctx), UNREACHABLE)}
    if checks["database"] == OK:
        checks["kek"] = _run(
            "kek",
            lambda: _kek(ctx),
            "the key-encryption key does not open this database's check value",
        )
        checks["ledger"] = _run(
            "ledger",
            lambda: _ledger(ctx),
            f"the ledger cannot be written (refused, or locked for over {LOCK_WAIT_MS} ms)",
        )
        checks["durability"] = _advise(
            "durability", lambda: _durability(ctx), "the database settings cannot be read"
        )
        checks["pairs"] = _advise("pairs", lambda: _pairs(ctx), "pair holds cannot be read")
        checks["links"] = _advise(
            "links", lambda: _links(ctx), "link rates or their plan cannot be read"
        )
        checks["registry"] = _advise(
            "registry", lambda: _registry(ctx), "registry comparisons cannot be read"
        )
    else:
        checks["kek"] = checks["ledger"] = NOT_CHECKED
        checks["durability"] = checks["pairs"] = checks["links"] = NOT_CHECKED
        checks["registry"] = NOT_CHECKED
    return Readiness(checks)


def _advise(name: str, check: Callable[[], str], problem: str) -> str:
    """Run an advisory check that returns ``ok`` or its marked value."""
    out = [OK]

    def run() -> None:
        out[0] = check()

    result = _run(name, run, problem)
    return out[0] if result == OK else result


def _durability(ctx: NodeContext) -> str:
    risks = durability_risks(ctx.db.engine)
    if not risks:
        return OK
    if ctx.settings.database.accept_data_loss_on_power_failure:
        return OVERRIDDEN + describe_risks(risks)
    raise NotReady("the database can lose committed transactions on power loss")


def _pairs(ctx: NodeContext) -> str:
    held = holds.open_holds(ctx)
    if not held:
        return OK
    return HELD + ", ".join(f"{h.pair_id} ({h.behind} {h.reason})" for h in held)


def _links(ctx: NodeContext) -> str:
    low = [c for c in observed.plan_checks(ctx) if c.far_below]
    if not low:
        return OK
    return BELOW_PLAN + ", ".join(
        f"{c.link_id} at {100 * (c.ratio or 0.0):.0f} % of plan (clouds, pointing or the module?)"
        for c in low
    )


def _registry(ctx: NodeContext) -> str:
    notes = []
    for view in registry_watch.views(ctx):
        if view.disagreements:
            notes.append(
                f"{DISAGREES}{view.peer_id} on {registry_watch.describe(view.disagreements)}"
            )
        if view.checked_at is None:
            why = f" ({view.last_error})" if view.last_error is not None else ""
            notes.append(f"{NOT_COMPARED}{view.peer_id} yet{why}")
        elif view.last_error is not None:
            notes.append(f"{NOT_COMPARED}{view.peer_id} lately ({view.last_error})")
    return "; ".join(notes) if notes else OK


def _run(name: str, check: Callable[[], None], problem: str) -> str:
    try:
        check()
    except NotReady as exc:
        log.warning("readiness: %s: %s", name, exc)
        return str(exc)
    except (KeystrataError, SQLAlchemyError) as exc:
        # The type only: database error text can quote statements and parameters.
        log.warning("readiness: %s failed (%s)", name, type(exc).__name__)
        return problem
    return OK


def _database(ctx: NodeContext) -> None:
    with ctx.db.read() as s:
        _bound_waits(s, ctx.db.backend)
        try:
            node_id = s.execute(
                select(NodeMeta.value).where(NodeMeta.name == "node_id")
            ).scalar_one_or_none()
        finally:
            _restore_waits(s, ctx.db.backend)
    if node_id != ctx.node_id.encode():
        raise NotReady("the database does not belong to this node")


def _kek(ctx: NodeContext) -> None:
    with ctx.db.read() as s:
        check_kek(s, ctx.keyring)


def _ledger(ctx: NodeContext) -> None:
    # A reader session: closing it rolls back whatever it wrote, so the probe row and
    # the head lock never outlive this block; rollback() says so explicitly as well.
    with ctx.db.read() as s:
        _bound_waits(s, ctx.db.backend)
        try:
            # Write first: on SQLite a deferred transaction whose first statement
            # writes takes the write lock (waiting at most busy_timeout) before it
            # reads, like BEGIN IMMEDIATE; on PostgreSQL it locks the row.
            s.execute(
                update(LedgerHead)
                .where(LedgerHead.id == 1)
                .values(size=LedgerHead.size)
                .execution_options(synchronize_session=False)
            )
            size = s.execute(select(LedgerHead.size).where(LedgerHead.id == 1)).scalar_one()
            s.execute(
                insert(LedgerEntry).values(
                    idx=size, recorded_at=ctx.clock.now(), event=PROBE_EVENT, entry=b"{}"
                )
            )
        finally:
            # Put the timeout back on this very connection before the rollback
            # returns it to the pool.
            _restore_waits(s, ctx.db.backend)
            s.rollback()


def _bound_waits(s: Session, backend: str) -> None:
    if backend == "postgresql":
        # SET LOCAL ends with the transaction, whatever happens.
        s.execute(text(f"SET LOCAL lock_timeout = {LOCK_WAIT_MS}"))
        s.execute(text(f"SET LOCAL statement_timeout = {STATEMENT_MS}"))
    elif backend == "sqlite":
        # busy_timeout is per connection: remember it, and put it back before the
        # connection returns to the pool (see _restore_waits).
        previous = s.execute(text("PRAGMA busy_timeout")).scalar_one()
        s.info["keystrata_busy_timeout"] = int(previous)
        s.execute(text(f"PRAGMA busy_timeout = {LOCK_WAIT_MS}"))


def _restore_waits(s: Session, backend: str) -> None:
    previous = s.info.pop("keystrata_busy_timeout", None)
    if backend != "sqlite" or previous is None:
        return
    conn = s.connection()  # the session's connection until its transaction ends
    try:
        conn.exec_driver_sql(f"PRAGMA busy_timeout = {int(previous)}")
    except SQLAlchemyError:
        # Never hand a connection with a short timeout back to the pool.
        conn.invalidate()
