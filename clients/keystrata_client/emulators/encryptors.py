"""Encryptor emulator: pairs of SAEs that rekey through ETSI GS QKD 014, on a schedule.

Each pair is two emulated encryptors at two stations: the *master* SAE at station A and
the *slave* SAE at station B, each with its own TLS identity and its own node URL. Every
``interval_seconds`` the pair rekeys:

1. the master calls Get key (``enc_keys``) at station A for its slave, asking for
   ``keys_per_rekey`` keys of ``key_size_bits``;
2. it passes the key IDs, with the SHA-256 of each key as a check value, to its partner
   over a local channel (an ``asyncio.Queue``; real encryptors use their own link);
3. the slave calls Get key with key IDs (``dec_keys``) at station B, naming the master;
4. the slave compares the SHA-256 of each key it received with the master's check value
   (constant-time): equal is a *match*, different a *mismatch*.

Keys themselves never leave the two clients: not in the channel, the stats, nor a log.

Failures and what they count (see :class:`PairStats`; :data:`COLUMNS` names the counts
in words, as the emulator's table and the demo's screen show them):

* a 503 at ``enc_keys`` is normal while a station has no key ready yet (at start, after
  an outage): it counts in ``times_waited_for_key``, not as an error, and the master
  tries again at its next tick;
* at ``dec_keys`` a 503 (or a transport error before the request left) is retried every
  ``slave_retry_seconds`` for up to ``slave_patience_seconds``, counted in
  ``slave_retries``: station B may learn of an allocation made at station A a little
  later. A 503 means the node answered with an error and delivered nothing, so asking
  again cannot make a key be served twice;
* any other failure counts in ``errors`` under ``"<call>:<status>"`` (``enc_keys:401``,
  ``dec_keys:transport``, ``dec_keys:uncertain``, ``enc_keys:invalid-answer``), with the
  message in ``last_error``; keys the master obtained but the slave could not fetch
  count as ``keys_lost``.

``get_keys`` is never re-sent once the request may have reached the node (see
``keystrata_client._keys``); the emulator keeps that rule: a failed rekey is simply a
new rekey at the next tick.
"""

from __future__ import annotations

import asyncio
import contextlib
import copy
import hmac
import logging
import time
import uuid
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime

from keystrata_client._errors import ApiError, KeystrataClientError, TransportError
from keystrata_client._tls import TlsIdentity
from keystrata_client.emulators.encryptor_stats import COLUMNS, PairStats
from keystrata_client.keys import AsyncKeyClient, KeyContainer, UncertainDeliveryError

__all__ = ["COLUMNS", "EncryptorEmulator", "EncryptorPairSpec", "PairStats"]

logger = logging.getLogger(__name__)

ClientFactory = Callable[[str, TlsIdentity | None], AsyncKeyClient]


@dataclass(frozen=True, slots=True)
class EncryptorPairSpec:
    """One pair of emulated encryptors.

    Attributes:
        name: the pair's name in stats and logs (unique within an emulator).
        master_sae_id: SAE ID of the master encryptor, at station A.
        slave_sae_id: SAE ID of the slave encryptor, at station B.
        master_url: base URL of station A's node.
        slave_url: base URL of station B's node.
        master_identity: the master's TLS identity (None: no client certificate).
        slave_identity: the slave's TLS identity.
        key_size_bits: size of each key, in bits (a multiple of 8).
        keys_per_rekey: keys asked for at each rekey.
        interval_seconds: time between the starts of two rekeys.
    """

    name: str
    master_sae_id: str
    slave_sae_id: str
    master_url: str
    slave_url: str
    master_identity: TlsIdentity | None = None
    slave_identity: TlsIdentity | None = None
    key_size_bits: int = 256
    keys_per_rekey: int = 1
    interval_seconds: float = 1.0

    def __post_init__(self) -> None:
        if not (self.name and self.master_sae_id and self.slave_sae_id):
            raise ValueError("name, master_sae_id and slave_sae_id must not be empty")
        if self.master_sae_id == self.slave_sae_id:
            raise ValueError("master and slave must be two SAEs")
        if self.key_size_bits < 8 or self.key_size_bits % 8:
            raise ValueError("key_size_bits must be a positive multiple of 8")
        if self.keys_per_rekey < 1:
            raise ValueError("keys_per_rekey must be at least 1")
        if not self.interval_seconds > 0:
            raise ValueError("interval_seconds must be positive")


@dataclass(frozen=True, slots=True)
class _Rekey:
    """What the master tells its slave: key IDs and a SHA-256 check value per key."""

    key_ids: tuple[str, ...]
    checks: dict[uuid.UUID, str]


@dataclass
class _Pair:
    spec: EncryptorPairSpec
    stats: PairStats
    channel: asyncio.Queue[_Rekey | None] = field(default_factory=asyncio.Queue)
    fetching: _Rekey | None = None


def _default_client(url: str, identity: TlsIdentity | None) -> AsyncKeyClient:
    # The client's own retries stay on: for key calls they cover only requests that
    # never left, which is always safe.
    return AsyncKeyClient(url, identity)


def _kind(exc: KeystrataClientError) -> str:
    if isinstance(exc, ApiError):
        return str(exc.status)
    if isinstance(exc, UncertainDeliveryError):
        return "uncertain"
    if isinstance(exc, TransportError):
        return "transport"
    return "invalid-answer"


class EncryptorEmulator:
    """Emulates pairs of encryptors rekeying; run it with ``await run()``.

    Args:
        specs: the pairs.
        drain_seconds: after the end, how long slaves keep fetching key IDs already
            passed to them (those keys are allocated at station A and should be used).
        slave_patience_seconds: how long a slave keeps retrying one ``dec_keys`` after
            503 answers or unsent requests.
        slave_retry_seconds: wait between two such retries.
        client_factory: builds the client of one SAE from (url, identity); the emulator
            closes what it returns. Tests pass clients on a mock transport.
        monotonic, now: the clock for the schedule and the wall clock for stats.

    Raises:
        ValueError: no pairs, two pairs with one name, or an option out of range.
    """

    def __init__(
        self,
        specs: Iterable[EncryptorPairSpec],
        *,
        drain_seconds: float = 5.0,
        slave_patience_seconds: float = 5.0,
        slave_retry_seconds: float = 0.2,
        client_factory: ClientFactory = _default_client,
        monotonic: Callable[[], float] = time.monotonic,
        now: Callable[[], datetime] = lambda: datetime.now(UTC),
    ) -> None:
        specs = list(specs)
        if not specs or len({s.name for s in specs}) != len(specs):
            raise ValueError("give at least one pair, each name once")
        if drain_seconds < 0 or slave_patience_seconds < 0 or slave_retry_seconds <= 0:
            raise ValueError("drain and patience must not be negative, retry must be positive")
        self.specs = specs
        self.drain_seconds = drain_seconds
        self.slave_patience_seconds = slave_patience_seconds
        self.slave_retry_seconds = slave_retry_seconds
        self._client_factory = client_factory
        self._monotonic = monotonic
        self._now = now
        self._stats = {s.name: PairStats(s.name) for s in specs}
        self._stopping: asyncio.Event | None = None
        self._stop_requested = False

    def __repr__(self) -> str:
        return f"EncryptorEmulator(pairs={[s.name for s in self.specs]!r})"

    @property
    def stats(self) -> dict[str, PairStats]:
        """Return a copy of every pair's stats, keyed by pair name."""
        return copy.deepcopy(self._stats)

    def stop(self) -> None:
        """Ask a running :meth:`run` to stop rekeying, drain and return; return None."""
        self._stop_requested = True
        if self._stopping is not None:
            self._stopping.set()

    # -- the two encryptors of a pair ----------------------------------------------------

    def _failed(self, pair: _Pair, call: str, exc: KeystrataClientError) -> None:
        stats = pair.stats
        label = f"{call}:{_kind(exc)}"
        first = label not in stats.errors
        stats.errors[label] = stats.errors.get(label, 0) + 1
        stats.last_error = f"{call}: {exc}"
        if first:
            logger.warning("pair %s: %s failed: %s", pair.spec.name, call, exc)

    async def _master(
        self, pair: _Pair, client: AsyncKeyClient, stopping: asyncio.Event, rekeys: int | None
    ) -> None:
        spec, stats = pair.spec, pair.stats
        next_at = self._monotonic()
        handed = 0
        try:
            while not stopping.is_set() and (rekeys is None or handed < rekeys):
                stats.rekeys_attempted += 1
                try:
                    container = await client.get_keys(
                        spec.slave_sae_id, number=spec.keys_per_rekey, size=spec.key_size_bits
                    )
                except ApiError as exc:
                    if exc.status == 503:
                        stats.times_waited_for_key += 1
                    else:
                        self._failed(pair, "enc_keys", exc)
                except KeystrataClientError as exc:
                    self._failed(pair, "enc_keys", exc)
                else:
                    stats.keys_obtained += len(container)
                    pair.channel.put_nowait(_rekey(container))
                    handed += 1
                    if rekeys is not None and handed >= rekeys:
                        break
                next_at += spec.interval_seconds
                current = self._monotonic()
                if next_at < current:
                    # Behind schedule: skip the missed ticks rather than rekey in a burst.
                    next_at = current
                await _wait(stopping, next_at - current)
        finally:
            # End of stream: the slave drains what was passed before and returns.
            pair.channel.put_nowait(None)

    async def _slave(self, pair: _Pair, client: AsyncKeyClient) -> None:
        while (message := await pair.channel.get()) is not None:
            pair.fetching = message
            await self._fetch(pair, client, message)
            pair.fetching = None

    async def _fetch(self, pair: _Pair, client: AsyncKeyClient, message: _Rekey) -> None:
        spec, stats = pair.spec, pair.stats
        deadline = self._monotonic() + self.slave_patience_seconds
        while True:
            try:
                container = await client.get_keys_with_ids(spec.master_sae_id, message.key_ids)
                break
            except KeystrataClientError as exc:
                unsent = isinstance(exc, TransportError) and not isinstance(
                    exc, UncertainDeliveryError
                )
                served_nothing = isinstance(exc, ApiError) and exc.status == 503
                if (unsent or served_nothing) and self._monotonic() < deadline:
                    stats.slave_retries += 1
                    await asyncio.sleep(self.slave_retry_seconds)
                    continue
                self._failed(pair, "dec_keys", exc)
                stats.keys_lost += len(message.key_ids)
                return
        all_match = True
        for key in container:
            expected = message.checks.get(uuid.UUID(key.key_id), "")
            if hmac.compare_digest(expected, key.digest()):
                stats.matches += 1
            else:
                stats.mismatches += 1
                all_match = False
                logger.warning("pair %s: key %s differs at the two ends", spec.name, key.key_id)
        stats.keys_delivered += len(container)
        stats.bits_delivered += sum(key.size for key in container)
        if all_match:
            stats.rekeys_completed += 1
        stats.last_rekey_at = self._now()

    # -- running -------------------------------------------------------------------------

    async def run(
        self, duration: float | None = None, *, rekeys: int | None = None
    ) -> dict[str, PairStats]:
        """Rekey until :meth:`stop` or for ``duration`` seconds; return the stats.

        With ``rekeys``, each master stops after handing that many sets of keys to its
        slave (503 answers and failed calls do not count), and the run ends when every
        master has, or earlier at the end of ``duration`` or on :meth:`stop`.

        After the end, masters finish the call they are in and start no other; slaves
        fetch the key IDs already passed to them for up to ``drain_seconds``. Clients
        are closed on return.

        Raises:
            RuntimeError: the emulator is already running.
            ValueError: ``rekeys`` is below 1.
        """
        if rekeys is not None and rekeys < 1:
            raise ValueError("rekeys must be at least 1")
        if self._stopping is not None:
            raise RuntimeError("this emulator is already running")
        stopping = self._stopping = asyncio.Event()
        if self._stop_requested:
            stopping.set()
        clients: list[AsyncKeyClient] = []
        tasks: list[asyncio.Task[None]] = []
        pairs: list[_Pair] = []
        try:
            masters: list[asyncio.Task[None]] = []
            slaves: list[asyncio.Task[None]] = []
            for spec in self.specs:
                pair = _Pair(spec, self._stats[spec.name])
                pairs.append(pair)
                master = self._client_factory(spec.master_url, spec.master_identity)
                clients.append(master)
                slave = self._client_factory(spec.slave_url, spec.slave_identity)
                clients.append(slave)
                masters.append(asyncio.create_task(self._master(pair, master, stopping, rekeys)))
                slaves.append(asyncio.create_task(self._slave(pair, slave)))
            tasks = [*masters, *slaves]
            timer = asyncio.create_task(_wait(stopping, duration))
            tasks.append(timer)
            # Masters end early only when they did their rekeys; errors surface below.
            every_master = asyncio.gather(*masters, return_exceptions=True)
            await asyncio.wait((timer, every_master), return_when=asyncio.FIRST_COMPLETED)
            stopping.set()
            await asyncio.wait(tasks, timeout=self.drain_seconds)
        finally:
            # Whatever ended the run (stop, duration, an error, cancellation), no task
            # outlives it and every client is closed.
            for task in tasks:
                task.cancel()
            results = await asyncio.gather(*tasks, return_exceptions=True)
            for result in results:
                if isinstance(result, Exception):
                    logger.error("encryptor task failed: %s", type(result).__name__)
            for client in clients:
                await client.aclose()
            for pair in pairs:
                # Key IDs the slave had no time to fetch: allocated at A, never used.
                if pair.fetching is not None:
                    pair.stats.keys_lost += len(pair.fetching.key_ids)
                while not pair.channel.empty():
                    message = pair.channel.get_nowait()
                    if message is not None:
                        pair.stats.keys_lost += len(message.key_ids)
            self._stopping = None
            self._stop_requested = False
        return self.stats


def _rekey(container: KeyContainer) -> _Rekey:
    return _Rekey(
        key_ids=container.key_ids,
        checks={uuid.UUID(key.key_id): key.digest() for key in container},
    )


async def _wait(event: asyncio.Event, timeout: float | None) -> None:
    """Return when ``event`` is set or ``timeout`` seconds have passed (None: never)."""
    with contextlib.suppress(TimeoutError):
        await asyncio.wait_for(event.wait(), timeout)
