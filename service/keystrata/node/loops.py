"""A node's background loops (threads), started and stopped with the web app's lifespan
by the composition root (:mod:`keystrata.server`)."""

from __future__ import annotations

import contextlib
import logging
import threading
import time
from collections.abc import Callable
from datetime import timedelta

from sqlalchemy.exc import IntegrityError

from keystrata.config import Role
from keystrata.context import NodeContext
from keystrata.delivery import slave_copy
from keystrata.ledger import checkpoints
from keystrata.node import history
from keystrata.node.registry_watch import compare_once as compare_registry
from keystrata.peering import outbox, sender
from keystrata.peering.client import PeerClient
from keystrata.relay import confirmation, scheduler
from keystrata.restore import loop
from keystrata.storage import leases

log = logging.getLogger("keystrata.node")


class Background:
    """The loops of one worker process: outbox delivery everywhere, the scheduler on a
    relay (only while this process holds the lease), segment expiry on a station, and
    everywhere the comparison of shared registry facts with each peer (under a lease per
    peer)."""

    def __init__(self, ctx: NodeContext, peers: PeerClient) -> None:
        self.ctx = ctx
        self.peers = peers
        self.holder = leases.new_holder()
        self.stop_event = threading.Event()
        #: Set when this process commits a new outbox message, or to stop.
        self.wake = threading.Event()
        self._unwake: Callable[[], None] | None = None
        self.threads: list[threading.Thread] = []
        #: Monotonic time until which this process surely holds the scheduler lease
        #: without renewing it (half its time to live after the last renewal).
        self._lease_sure_until = 0.0

    def start(self) -> None:
        self._unwake = outbox.wake_on_commit(self.ctx.db, self.wake)
        loops: list[tuple[str, Callable[[], object], float]] = [
            ("outbox", self._outbox, self.ctx.settings.outbox.idle_seconds),
            ("checkpoints", self._checkpoint, 1.0),
            (
                "history",
                lambda: history.sample_once(self.ctx, self.holder),
                self.ctx.settings.dashboard.sample_seconds,
            ),
        ]
        if self.ctx.role is Role.RELAY:
            loops.append(("scheduler", self._schedule, self.ctx.settings.relay.cycle_seconds))
        else:
            loops.append(("expiry", self._expire, 5.0))
            loop.at_start(self.ctx, self.peers)
            loops.append(
                (
                    "restore-check",
                    lambda: loop.check_once(self.ctx, self.peers, self.holder),
                    min(self.ctx.settings.restore_check.interval_seconds, loop.RETRY_SECONDS),
                )
            )
        loops.append(
            (
                "registry-compare",
                lambda: compare_registry(self.ctx, self.peers, self.holder),
                self.ctx.settings.peer.registry_compare_seconds,
            )
        )
        for name, step, idle in loops:
            t = threading.Thread(
                target=self._loop, args=(name, step, idle), name=f"keystrata-{name}", daemon=True
            )
            t.start()
            self.threads.append(t)

    def stop(self) -> None:
        if self._unwake is not None:
            self._unwake()
        self.stop_event.set()
        self.wake.set()
        for t in self.threads:
            t.join(timeout=10)

    def _loop(self, name: str, step: Callable[[], object], idle: float) -> None:
        # The outbox loop also wakes when a commit of this process enqueued a message;
        # cleared before each step, so a commit during the step means one more step.
        wake = self.wake if name == "outbox" else self.stop_event
        while not self.stop_event.is_set():
            if wake is self.wake:
                wake.clear()
            try:
                busy = step()
            except Exception:  # a loop must survive a bad moment (database restart...)
                log.exception("%s: step failed; retrying", name)
                busy = False
            if not busy:
                wake.wait(idle)
            elif wake is self.wake:
                self.stop_event.wait(self.ctx.settings.outbox.linger_seconds)

    def _outbox(self) -> bool:
        return sender.deliver_once(self.ctx, self.peers, self.holder) > 0

    def _schedule(self) -> bool:
        cfg = self.ctx.settings.relay
        ttl = timedelta(seconds=max(10.0, 5 * cfg.cycle_seconds))
        # Renewed once half its time to live has gone, not every cycle: a renewal is a
        # commit (an fsync), and a short cycle made it most of an idle relay's work.
        if time.monotonic() >= self._lease_sure_until:
            started = time.monotonic()
            if not leases.acquire(
                self.ctx.db, scheduler.LEASE, self.holder, now=self.ctx.clock.now(), ttl=ttl
            ):
                self._lease_sure_until = 0.0
                return False
            self._lease_sure_until = started + ttl.total_seconds() / 2
        report = scheduler.schedule_once(self.ctx, self.peers, actor=f"scheduler@{self.holder}")
        if report.made:
            log.info("scheduler: made %d segments", len(report.made))
        return False  # one cycle per cycle_seconds

    def _checkpoint(self) -> bool:
        # Two workers signing the same tree size would collide on its primary key; the
        # loser's transaction rolls back and the loop carries on.
        with contextlib.suppress(IntegrityError):
            checkpoints.sign_now(self.ctx)
        return False

    def _expire(self) -> bool:
        timeout = timedelta(seconds=self.ctx.settings.segments.confirm_timeout_seconds)
        confirmation.expire_pending(self.ctx, self.ctx.clock.now() - timeout)
        slave_copy.expire(self.ctx)
        return False
