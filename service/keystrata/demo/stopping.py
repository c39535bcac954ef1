"""How the demo stops: Ctrl-C (SIGINT), SIGTERM and SIGHUP.

While the load runs, the first of these stops it: the link and encryptor emulators
drain, and the demo goes on to read the final levels, audit every ledger, print its
summary and stop the nodes, as at the end of ``--duration``. Any signal at another time
(before the load starts, or once it is stopping or stopped: a second Ctrl-C) stops the
demo at once: :class:`StopNow` is raised in the main thread, and the demo only stops
its nodes on the way out.

The node processes run in sessions of their own (``keystrata.loopback.processes``), so
the terminal's Ctrl-C reaches the demo alone and the nodes stay up until it stops them.
"""

from __future__ import annotations

import asyncio
import contextlib
import signal
from collections.abc import Callable, Iterator
from types import FrameType

#: The signals that stop the demo.
SIGNALS = (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)


class StopNow(KeyboardInterrupt):
    """A signal asked the demo to stop at once. A KeyboardInterrupt, so that no
    ``except Exception`` on the way swallows it, and so that asyncio lets it out of the
    event loop wherever it is raised (a task keeps any other BaseException to itself)."""

    def __init__(self, signum: int) -> None:
        super().__init__(signal.Signals(signum).name)
        self.signum = signum


class Stopper:
    """The demo's signal handler: stops the load gracefully once, then at once."""

    def __init__(self) -> None:
        self._load: tuple[asyncio.AbstractEventLoop, Callable[[], None]] | None = None
        self._raised = False
        self._ignoring = False
        #: The signal that stopped the load, if one did.
        self.stopped_by: int | None = None

    def install(self) -> None:
        """Handle :data:`SIGNALS` in this (the main) thread from now on."""
        for sig in SIGNALS:
            signal.signal(sig, self._handle)

    def load_started(self, loop: asyncio.AbstractEventLoop, stop: Callable[[], None]) -> None:
        """The load runs on ``loop``; the next signal calls ``stop`` there."""
        self._load = (loop, stop)

    def load_stopped(self) -> None:
        """The load is stopping or stopped: the next signal stops the demo at once."""
        self._load = None

    @contextlib.contextmanager
    def ignoring(self) -> Iterator[None]:
        """Ignore the signals inside: the demo is stopping its nodes, and a signal must
        not leave one running."""
        before, self._ignoring = self._ignoring, True
        try:
            yield
        finally:
            self._ignoring = before

    def _handle(self, signum: int, _frame: FrameType | None) -> None:
        if self._ignoring:
            return
        if self._load is not None:
            loop, stop = self._load
            self._load = None
            self.stopped_by = signum
            # Wakes the loop even while it waits in select().
            loop.call_soon_threadsafe(stop)
            return
        if self._raised:
            return  # already stopping at once: let the nodes be stopped
        self._raised = True
        raise StopNow(signum)
