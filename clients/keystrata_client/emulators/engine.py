"""Link emulator engine: the QKD modules of relay-station QKD links, pushing key to both ends.

For every link, the emulator integrates the modelled secret key rate over real time (a
fixed-rate link: ``model.py``; a physical one, from its optical profile: ``physical.py``),
cuts a block of ``block_bytes`` random bytes (``os.urandom``, a version 4 UUID as block
ID) each time enough bits have gathered, and queues the IDENTICAL block for both ends of
the link: the relay node and the station node. One sender per end pushes its queue in
batches over mutual TLS, concurrently with the other end.

Blocks carry the QBER the model gives for the moment they are made (see those modules).
Rate is in bits per real second. ``time_scale`` speeds up the sky (day, night, clouds),
not the detectors, so the pools at the nodes fill at the rate the summary line shows.

Keeping both ends the same: a block enters both queues or neither, and leaves a queue
only when that end has acknowledged it (a push that reached the node but whose answer
was lost is sent again; the node counts it as a duplicate). While an end is down its
queue grows; when either queue holds ``backlog_max_blocks``, new key is discarded before
it is queued anywhere (counted as ``blocks_discarded``), as a real module drops key its
buffer cannot hold. Nothing already queued is dropped, except:

* a batch an end refuses with 400 or 409 (sending it again cannot help): removed from
  that end's queue and counted as ``rejected``; a 413 halves the batch size first;
* blocks still queued when the run ends after ``drain_seconds``: counted as ``backlog``.

401, 403, 404, 503 and transport errors are retried with a backoff of up to
:data:`MAX_BACKOFF` seconds, so the emulator may start before the links are registered.
"""

from __future__ import annotations

import asyncio
import contextlib
import copy
import logging
import os
import random
import time
from collections import deque
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime

from keystrata_client._blocks import LinkBlock
from keystrata_client._errors import ApiError, KeystrataClientError
from keystrata_client._module import AsyncModuleClient
from keystrata_client._tls import TlsIdentity
from keystrata_client.emulators.config import LinkSpec
from keystrata_client.emulators.model import LinkState, RateModel, TimeScale, draw_qber
from keystrata_client.emulators.physical import PhysicalProfile, rate_model

__all__ = ["ENDS", "EndStats", "LinkEmulator", "LinkSpec", "LinkStats"]

logger = logging.getLogger(__name__)

#: The two ends of every link, in the order stats list them.
ENDS = ("relay", "station")
#: Longest wait between two attempts at an end that keeps failing, in real seconds.
MAX_BACKOFF = 5.0

ClientFactory = Callable[[str, TlsIdentity | None], AsyncModuleClient]


@dataclass
class EndStats:
    """Counters for one end of a link. ``bits_accepted`` is what the node stored."""

    url: str
    blocks_acked: int = 0
    blocks_accepted: int = 0
    bits_accepted: int = 0
    duplicates: int = 0
    rejected: int = 0
    errors: int = 0
    backlog: int = 0
    last_error: str | None = None
    last_push_at: datetime | None = None


@dataclass
class LinkStats:
    """Counters and current model state of one link (a snapshot when read).

    ``rate_bps`` is the rate emulated now; ``planned_rate_bps`` and ``planned_qber`` the
    clear-sky figures (on station); ``mode`` is ``"fixed"`` or ``"physical"``, and
    ``sun_elevation_deg`` (the sun over the station) is ``None`` in fixed-rate mode. The
    other model fields are those of :class:`~keystrata_client.emulators.model.LinkState`.
    """

    link_id: str
    relay: EndStats
    station: EndStats
    mode: str = "fixed"
    blocks_generated: int = 0
    bits_generated: int = 0
    blocks_discarded: int = 0
    rate_bps: float = 0.0
    planned_rate_bps: float = 0.0
    planned_qber: float | None = None
    weather: str = "clear"
    on_station: bool = True
    sun_elevation_deg: float | None = None
    daylight: float = 1.0
    emulated_at: datetime | None = None

    def end(self, name: str) -> EndStats:
        """Return the stats of end ``name`` ("relay" or "station")."""
        return self.relay if name == "relay" else self.station


def _default_client(url: str, identity: TlsIdentity | None) -> AsyncModuleClient:
    # One attempt per call: the sender below owns the retry loop and its backoff.
    return AsyncModuleClient(url, identity, attempts=1)


@dataclass
class _Link:
    spec: LinkSpec
    model: RateModel
    qber_rng: random.Random
    stats: LinkStats
    carry_bits: float = 0.0
    queues: dict[str, deque[LinkBlock]] = field(default_factory=dict)
    wake: dict[str, asyncio.Event] = field(default_factory=dict)


class LinkEmulator:
    """Emulates the QKD modules of several links; run it with ``await run()``.

    Args:
        specs: the links.
        time_scale: emulated seconds per real second.
        start: emulated POSIX second at which the run starts (default: now).
        tick_seconds: real seconds between two rate integrations.
        push_interval_seconds: real seconds a sender waits to gather a batch.
        batch_max_blocks: blocks per push at most.
        backlog_max_blocks: queued blocks per end at most (see module docstring).
        drain_seconds: after stop, how long senders keep pushing their queues.
        binary: push the binary form (else JSON).
        client_factory: builds the client for one end from (url, identity); the
            emulator closes what it returns. Tests pass clients on a mock transport.
        monotonic, now, urandom: the clock, the wall clock for ``produced_at``, and
            the source of key bytes (``os.urandom``); tests pass fakes.

    Raises:
        ValueError: no links, two links with one ID, or an option out of range.
    """

    def __init__(
        self,
        specs: Iterable[LinkSpec],
        *,
        time_scale: float = 1.0,
        start: float | None = None,
        tick_seconds: float = 0.25,
        push_interval_seconds: float = 1.0,
        batch_max_blocks: int = 64,
        backlog_max_blocks: int = 4096,
        drain_seconds: float = 5.0,
        binary: bool = True,
        client_factory: ClientFactory = _default_client,
        monotonic: Callable[[], float] = time.monotonic,
        now: Callable[[], datetime] = lambda: datetime.now(UTC),
        urandom: Callable[[int], bytes] = os.urandom,
    ) -> None:
        specs = list(specs)
        if not specs or len({s.link_id for s in specs}) != len(specs):
            raise ValueError("give at least one link, each link_id once")
        if tick_seconds <= 0 or push_interval_seconds < 0 or drain_seconds < 0:
            raise ValueError("tick, push interval and drain times must be positive")
        if batch_max_blocks < 1 or backlog_max_blocks < 1:
            raise ValueError("batch_max_blocks and backlog_max_blocks must be at least 1")
        self.scale = TimeScale(start if start is not None else now().timestamp(), time_scale)
        self.tick_seconds = tick_seconds
        self.push_interval_seconds = push_interval_seconds
        self.batch_max_blocks = batch_max_blocks
        self.backlog_max_blocks = backlog_max_blocks
        self.drain_seconds = drain_seconds
        self.binary = binary
        self._client_factory = client_factory
        self._monotonic = monotonic
        self._now = now
        self._urandom = urandom
        self._links = [self._make_link(s) for s in specs]
        self._stopping: asyncio.Event | None = None
        self._stop_requested = False

    def _make_link(self, spec: LinkSpec) -> _Link:
        stats = LinkStats(spec.link_id, EndStats(spec.relay_url), EndStats(spec.station_url))
        stats.mode = "physical" if isinstance(spec.model, PhysicalProfile) else "fixed"
        link = _Link(
            spec=spec,
            model=rate_model(spec.model, seed=spec.seed, start=self.scale.start),
            # QBER values are reported figures, not key: a seeded PRNG keeps runs repeatable.
            qber_rng=random.Random(spec.seed + 1),  # noqa: S311
            stats=stats,
        )
        link.queues = {end: deque() for end in ENDS}
        return link

    @property
    def stats(self) -> dict[str, LinkStats]:
        """Return a copy of every link's stats, keyed by link ID."""
        return {link.spec.link_id: copy.deepcopy(link.stats) for link in self._links}

    def stop(self) -> None:
        """Ask a running :meth:`run` to stop generating, drain and return; return None."""
        self._stop_requested = True
        if self._stopping is not None:
            self._stopping.set()

    # -- generating ----------------------------------------------------------------------

    def _observe(self, link: _Link, t: float) -> LinkState:
        state = link.model.state_at(t)
        stats = link.stats
        if stats.emulated_at is not None:
            if stats.weather != state.weather.value:
                logger.info("link %s: weather now %s", link.spec.link_id, state.weather.value)
            if stats.on_station != state.on_station:
                where = "on" if state.on_station else "off"
                logger.info("link %s: platform now %s station", link.spec.link_id, where)
        stats.rate_bps = state.rate_bps
        stats.planned_rate_bps = state.planned_rate_bps
        stats.planned_qber = state.planned_qber
        stats.weather = state.weather.value
        stats.on_station = state.on_station
        stats.sun_elevation_deg = state.sun_elevation_deg
        stats.daylight = state.daylight
        stats.emulated_at = datetime.fromtimestamp(t, UTC)
        return state

    def _generate(self, link: _Link, dt: float) -> None:
        """Add ``dt`` real seconds of key at the current rate; queue completed blocks."""
        spec, stats = link.spec, link.stats
        link.carry_bits += stats.rate_bps * dt
        # A CV link has no QBER in the model: its blocks say 0.0 (physical.py).
        qber = stats.planned_qber if stats.planned_qber is not None else 0.0
        block_bits = 8 * spec.block_bytes
        made = False
        while link.carry_bits >= block_bits:
            link.carry_bits -= block_bits
            if max(len(q) for q in link.queues.values()) >= self.backlog_max_blocks:
                stats.blocks_discarded += 1
                continue
            block = LinkBlock.new(
                self._urandom(spec.block_bytes),
                qber=draw_qber(link.qber_rng, qber, spec.model.qber_sd),
                epsilon=spec.epsilon,
                produced_at=self._now(),
            )
            for queue in link.queues.values():
                queue.append(block)
            stats.blocks_generated += 1
            stats.bits_generated += block_bits
            made = True
        for end in ENDS:
            stats.end(end).backlog = len(link.queues[end])
            if made:
                link.wake[end].set()

    async def _generator(self, stopping: asyncio.Event) -> None:
        started = last = self._monotonic()
        for link in self._links:
            self._observe(link, self.scale.emulated(0.0))
        while True:
            await _wait(stopping, self.tick_seconds)
            if stopping.is_set():
                # No block may appear after the stop: a sender that saw an empty queue
                # and the stop has already gone home.
                return
            current = self._monotonic()
            for link in self._links:
                # Integrate with the rate seen at the start of the interval, then look
                # again: a weather change inside one tick shifts at most one tick of key.
                self._generate(link, current - last)
                self._observe(link, self.scale.emulated(current - started))
            last = current

    # -- sending -------------------------------------------------------------------------

    async def _sender(
        self, link: _Link, end: str, client: AsyncModuleClient, stopping: asyncio.Event
    ) -> None:
        queue, wake, stats = link.queues[end], link.wake[end], link.stats.end(end)
        link_id = link.spec.link_id
        batch_size, failures = self.batch_max_blocks, 0
        while True:
            if not queue:
                if stopping.is_set():
                    return
                wake.clear()
                await _wait(wake, self.tick_seconds)
                continue
            if len(queue) < batch_size and not stopping.is_set():
                await _wait(stopping, self.push_interval_seconds)
            batch = [queue[i] for i in range(min(batch_size, len(queue)))]
            try:
                result = await client.push_blocks(link_id, batch, binary=self.binary)
            except KeystrataClientError as exc:
                failures += 1
                stats.errors += 1
                stats.last_error = str(exc)
                if failures == 1:
                    logger.warning("link %s, %s end: push failed: %s", link_id, end, exc)
                if isinstance(exc, ApiError) and exc.status == 413 and batch_size > 1:
                    batch_size = max(1, batch_size // 2)
                    continue
                if isinstance(exc, ApiError) and exc.status in (400, 409, 413):
                    for _ in batch:
                        queue.popleft()
                    stats.rejected += len(batch)
                    stats.backlog = len(queue)
                    continue
                await asyncio.sleep(min(MAX_BACKOFF, 0.25 * 2 ** min(failures, 8)))
                continue
            if failures:
                logger.info("link %s, %s end: back after %d errors", link_id, end, failures)
            failures = 0
            for _ in batch:
                queue.popleft()
            stats.blocks_acked += len(batch)
            stats.blocks_accepted += result.accepted
            stats.bits_accepted += result.accepted_bits
            stats.duplicates += result.duplicates
            stats.backlog = len(queue)
            stats.last_push_at = self._now()

    # -- running -------------------------------------------------------------------------

    async def run(self, duration: float | None = None) -> dict[str, LinkStats]:
        """Emulate until :meth:`stop` or for ``duration`` real seconds; return the stats.

        After the end, senders keep pushing their queues for up to ``drain_seconds``;
        whatever is left is reported as ``backlog``. Clients are closed on return.

        Raises:
            RuntimeError: the emulator is already running.
        """
        if self._stopping is not None:
            raise RuntimeError("this emulator is already running")
        stopping = self._stopping = asyncio.Event()
        if self._stop_requested:
            stopping.set()
        clients: dict[tuple[str, str], AsyncModuleClient] = {}
        tasks: list[asyncio.Task[None]] = []
        try:
            for link in self._links:
                link.wake = {end: asyncio.Event() for end in ENDS}
                for end in ENDS:
                    url = getattr(link.spec, f"{end}_url")
                    identity = getattr(link.spec, f"{end}_identity")
                    clients[link.spec.link_id, end] = self._client_factory(url, identity)
            senders = [
                asyncio.create_task(
                    self._sender(link, end, clients[link.spec.link_id, end], stopping)
                )
                for link in self._links
                for end in ENDS
            ]
            generator = asyncio.create_task(self._generator(stopping))
            tasks = [generator, *senders]
            await _wait(stopping, duration)
            stopping.set()
            await generator
            await asyncio.wait(senders, timeout=self.drain_seconds)
        finally:
            # Whatever ended the run (stop, duration, an error, cancellation), no task
            # outlives it and every client is closed.
            for task in tasks:
                task.cancel()
            results = await asyncio.gather(*tasks, return_exceptions=True)
            for result in results:
                if isinstance(result, Exception):
                    logger.error("emulator task failed: %s", type(result).__name__)
            for client in clients.values():
                await client.aclose()
            self._stopping = None
            self._stop_requested = False
        for link in self._links:
            for end in ENDS:
                link.stats.end(end).backlog = len(link.queues[end])
        return self.stats


async def _wait(event: asyncio.Event, timeout: float | None) -> None:
    """Return when ``event`` is set or ``timeout`` seconds have passed (None: never)."""
    with contextlib.suppress(TimeoutError):
        await asyncio.wait_for(event.wait(), timeout)
