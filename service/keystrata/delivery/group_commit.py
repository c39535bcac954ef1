"""Group commit: requests that arrive while a write transaction is running are served
together by the next one.

Every Get key and Get key with key IDs changes key state and appends to the ledger, and
a node's write transactions run one after another (SQLite admits one writer; the
ledger's head row serialises them on PostgreSQL). One transaction per request would cap
a station at one commit flush per request. Here the first request to arrive becomes the
leader: it takes every request queued so far, runs them in one transaction (one flush)
and hands each its own result. Requests that arrive meanwhile queue for the next
leader. Under no load a batch is a single request and nothing waits; under load the
batch grows with the queue.

A batch whose transaction the database ended to break a deadlock (PostgreSQL) runs
again, up to :data:`CONFLICT_ATTEMPTS` times: nothing of it was committed, and a batch
function keeps no state outside its transaction but counters of unmet demand.

Each request still gets its own outcome: the batch function returns a result or an
exception per request, so one request's refusal does not fail its neighbours. Only an
error of the transaction itself (the database went away) reaches every request of it,
and then nothing of the batch was committed.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Sequence
from typing import Any, Generic, TypeVar

from keystrata.errors import TransactionConflict

T = TypeVar("T")
#: Times a batch runs when the database ends its transaction to break a deadlock.
CONFLICT_ATTEMPTS = 3
#: Pause before the second run of such a batch (twice that before the third).
CONFLICT_PAUSE_S = 0.01
R = TypeVar("R")

#: A batch function: one result (or the exception to raise) per request, in order.
BatchFn = Callable[[Sequence[T]], Sequence["R | BaseException"]]


class _Slot(Generic[T, R]):
    __slots__ = ("done", "error", "item", "result")

    def __init__(self, item: T) -> None:
        self.item = item
        self.done = False
        self.result: R | None = None
        self.error: BaseException | None = None


class GroupCommit(Generic[T, R]):
    """Serve concurrent requests in batches of at most ``max_batch``, one batch at a time."""

    def __init__(self, run: BatchFn[T, R], *, max_batch: int = 64) -> None:
        if max_batch < 1:
            raise ValueError("max_batch must be at least 1")
        self._run = run
        self._max = max_batch
        self._queue: list[_Slot[T, R]] = []
        self._queue_lock = threading.Lock()
        self._leader = threading.Lock()

    def submit(self, item: T) -> R:
        """Run ``item`` in the next batch and return its result (or raise its error)."""
        slot: _Slot[T, R] = _Slot(item)
        with self._queue_lock:
            self._queue.append(slot)
        while not slot.done:
            with self._leader:
                if not slot.done:
                    self._lead()
        if slot.error is not None:
            raise slot.error
        return slot.result  # type: ignore[return-value]

    def _lead(self) -> None:
        with self._queue_lock:
            batch, self._queue = self._queue[: self._max], self._queue[self._max :]
        if not batch:
            return
        items = [s.item for s in batch]
        for attempt in range(1, CONFLICT_ATTEMPTS + 1):
            try:
                results = list(self._run(items))
                if len(results) != len(batch):
                    raise RuntimeError("a batch function returned the wrong number of results")
            except TransactionConflict as exc:
                # Rolled back whole (a deadlock broken by PostgreSQL): run it again.
                results = [exc] * len(batch)
                if attempt < CONFLICT_ATTEMPTS:
                    # Let the transaction PostgreSQL kept commit before running again.
                    time.sleep(CONFLICT_PAUSE_S * attempt)
                    continue
            except BaseException as exc:  # the transaction failed: every request of it did
                results = [exc] * len(batch)
            break
        for slot, result in zip(batch, results, strict=True):
            if isinstance(result, BaseException):
                slot.error = result
            else:
                slot.result = result
            slot.done = True


def shared(
    groups: dict[str, Any], name: str, run: BatchFn[T, R], *, max_batch: int = 64
) -> GroupCommit[T, R]:
    """The group commit ``name`` of this process (kept in ``groups``, the node context's
    per-process state), created around ``run`` on first use."""
    group = groups.get(name)
    if group is None:
        group = groups.setdefault(name, GroupCommit(run, max_batch=max_batch))
    assert isinstance(group, GroupCommit)
    return group
