"""What this process has read of the registry and of pair holds, kept while it holds.

Every change of the registry tables and of ``pair_hold`` raises one counter, the
registry generation, by database trigger (migration 0011), whichever process or tool
writes it. A snapshot is the facts this process read at one generation; a request reads
the counter once (one small statement, no session) and uses the snapshot of that
generation, or starts an empty one when the counter moved. So a retired SAE, a changed
pair or a new hold is seen by the very next request of every worker process, as it was
when every request read the rows themselves.

Facts are loaded on first use by the caller's loader and kept by key; a snapshot holds
only small, immutable values (tuples, frozen dataclasses, detached rows nobody changes).
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from typing import Any, TypeVar

from keystrata.context import NodeContext

T = TypeVar("T")

_STATE = "registry.snapshot"
_GENERATION_SQL = "SELECT value FROM registry_generation WHERE id = 1"
#: Facts one snapshot keeps at most; beyond, it stops keeping new ones (a flood of
#: unknown subjects must not grow the process).
MAX_FACTS = 65_536


class Snapshot:
    """The facts read at one registry generation."""

    def __init__(self, generation: int) -> None:
        self.generation = generation
        self._facts: dict[tuple[str, Any], Any] = {}
        self._lock = threading.Lock()

    def get(self, kind: str, key: Any, load: Callable[[], T]) -> T:
        """The fact ``(kind, key)``, loaded with ``load`` on first use."""
        try:
            value: T = self._facts[(kind, key)]
            return value
        except KeyError:
            pass
        value = load()
        with self._lock:
            if len(self._facts) < MAX_FACTS:
                self._facts[(kind, key)] = value
        return value


def fresh(ctx: NodeContext) -> Snapshot:
    """The snapshot of the registry generation as it stands now (one small read)."""
    generation = int(ctx.db.peek(_GENERATION_SQL))
    return _at(ctx, generation)


def at_least(ctx: NodeContext, generation: int | None) -> Snapshot:
    """The newest snapshot, when it is of ``generation`` or later (a request that read
    the counter already, through :func:`fresh`); else a fresh one."""
    current = ctx.process_state.get(_STATE)
    if (
        generation is not None
        and isinstance(current, Snapshot)
        and current.generation >= generation
    ):
        return current
    return fresh(ctx)


def _at(ctx: NodeContext, generation: int) -> Snapshot:
    current = ctx.process_state.get(_STATE)
    if isinstance(current, Snapshot) and current.generation == generation:
        return current
    snapshot = Snapshot(generation)
    ctx.process_state[_STATE] = snapshot  # lower too: a database restored from a backup
    return snapshot
