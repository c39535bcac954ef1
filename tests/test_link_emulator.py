"""End to end: the link emulator pushes identical blocks to a real relay and a real station.

Two ``keystrata serve`` processes (``relay-1`` and ``station-a``) run on loopback with
mutual TLS, each on its own database, both provisioned through ``OperatorClient`` with
link ``link-a`` and the QKD module principal ``mod-link-a``. The emulator
(``keystrata_client.emulators``) plays that module and pushes to both ends.

What the nodes hold is read from their own databases through keystrata's storage layer
and opened with each node's KEK. Keys are compared by SHA-256 digest only: no test here
holds a key longer than it takes to hash it, and none prints one. The emulator's source
of key bytes is wrapped so that it records the digest of every block it makes, which
lets the tests say "both ends hold exactly what the module made", not merely "the two
ends agree".
"""

from __future__ import annotations

import asyncio
import hashlib
import os
import re
import shutil
import subprocess
import sys
import time
import uuid
from collections import Counter
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import httpx
import pytest
from sqlalchemy import select

from conftest import PkiFiles, _pg_admin, _pg_url
from keystrata.config import load_settings
from keystrata.services.node import load_keyring
from keystrata.storage.db import Database
from keystrata.storage.models import LinkBlock
from keystrata.storage.sealed import block_context
from keystrata_client import AsyncModuleClient, OperatorClient, TlsIdentity
from keystrata_client.emulators import LinkEmulator, LinkSpec, LinkStats, ModelParams
from processes import NodeProcess, prepare_node

pytestmark = pytest.mark.e2e

LINK = "link-a"
BLOCK_BYTES = 1024
BLOCK_BITS = 8 * BLOCK_BYTES
#: Bits per real second; about 49 blocks a second, so a few seconds give 100+ blocks.
RATE_BPS = 400_000.0
#: Emulated start: midnight UTC. With day_factor 1 the sky never changes the rate.
START = datetime(2026, 6, 21, tzinfo=UTC)


def identity(pki: PkiFiles, name: str) -> TlsIdentity:
    return TlsIdentity(ca=pki.ca, cert=pki.cert(name), key=pki.key(name))


# ---------------------------------------------------------------- two nodes


@dataclass
class Network:
    """A running relay and station that share QKD link ``link-a``."""

    relay: NodeProcess
    station: NodeProcess

    def ends(self) -> tuple[tuple[str, NodeProcess], ...]:
        return (("relay", self.relay), ("station", self.station))


def _provision(node: NodeProcess, peer: NodeProcess, pki: PkiFiles) -> None:
    peer_role = "relay" if peer.node_id == "relay-1" else "station"
    with OperatorClient(node.url, identity(pki, "ops-ada")) as ops:
        ops.create("nodes", {"node_id": peer.node_id, "role": peer_role, "url": peer.url})
        ops.create("links", {"link_id": LINK, "relay_id": "relay-1", "station_id": "station-a"})
        ops.create(
            "principals",
            {
                "principal_id": "mod-link-a",
                "role": "qkd-module",
                "cert_subject": "mod-link-a",
                "link_id": LINK,
            },
        )


@contextmanager
def running_network(
    folder: Path, pki: PkiFiles, relay_db: str, station_db: str
) -> Iterator[Network]:
    """Initialise, start and provision both nodes (the two in parallel); stop them after."""
    with ThreadPoolExecutor(2) as pool:
        relay_job = pool.submit(prepare_node, folder / "relay-1", pki, "relay-1", "relay", relay_db)
        station_job = pool.submit(
            prepare_node, folder / "station-a", pki, "station-a", "station", station_db
        )
        net = Network(relay=relay_job.result(), station=station_job.result())
    try:
        with ThreadPoolExecutor(2) as pool:
            list(pool.map(lambda node: node.start(pki), (net.relay, net.station)))
        _provision(net.relay, net.station, pki)
        _provision(net.station, net.relay, pki)
        yield net
    finally:
        net.relay.stop()
        net.station.stop()


def _sqlite_copy(template: Path, path: Path) -> str:
    shutil.copy(template, path)
    return f"sqlite:///{path}"


@pytest.fixture
def relay_db_url(request: pytest.FixtureRequest, db_url: str, tmp_path: Path) -> Iterator[str]:
    """A second fresh database on the backend of ``db_url`` (which the station uses)."""
    if db_url.startswith("sqlite"):
        yield _sqlite_copy(request.getfixturevalue("sqlite_template"), tmp_path / "relay.db")
        return
    template = request.getfixturevalue("pg_template")
    name = f"ks_t_{os.getpid()}_relay_{uuid.uuid4().hex[:12]}"
    with _pg_admin() as admin:
        admin.execute(f'CREATE DATABASE "{name}" TEMPLATE "{template}"')
    yield _pg_url(name)
    with _pg_admin() as admin:
        admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@pytest.fixture
def network(tmp_path: Path, pki: PkiFiles, db_url: str, relay_db_url: str) -> Iterator[Network]:
    """Both nodes on the backend of ``db_url`` (SQLite files, or two PostgreSQL databases)."""
    with running_network(tmp_path, pki, relay_db_url, db_url) as net:
        yield net


@pytest.fixture
def sqlite_network(tmp_path: Path, pki: PkiFiles, sqlite_template: Path) -> Iterator[Network]:
    """Both nodes on SQLite files, for the tests that need one backend only."""
    relay_db = _sqlite_copy(sqlite_template, tmp_path / "relay.db")
    station_db = _sqlite_copy(sqlite_template, tmp_path / "station.db")
    with running_network(tmp_path, pki, relay_db, station_db) as net:
        yield net


# ---------------------------------------------------------------- what the nodes hold


def _digest(key: bytes) -> tuple[str, int]:
    # The only place a stored key is seen: hashed and measured, then dropped.
    return hashlib.sha256(key).hexdigest(), len(key)


def stored_blocks(node: NodeProcess) -> dict[str, str]:
    """Return block ID -> SHA-256 (hex) of the key bytes, for every block of ``link-a``
    in ``node``'s database, each opened with the node's KEK and its row's context."""
    settings = load_settings(node.config, env={})
    keyring = load_keyring(settings)
    db = Database.from_url(settings.database.url)
    try:
        with db.read() as s:
            rows = s.execute(
                select(LinkBlock.block_id, LinkBlock.used, LinkBlock.length, LinkBlock.sealed)
                .where(LinkBlock.link_id == LINK)
                .order_by(LinkBlock.seq)
            ).all()
    finally:
        db.dispose()
    out: dict[str, str] = {}
    for block_id, used, length, sealed in rows:
        # No relay operation ran, so every block is still whole.
        assert used == 0, f"block {block_id} was consumed"
        assert sealed is not None, f"block {block_id} has no sealed bytes"
        digest, size = _digest(keyring.open(sealed, block_context(LINK, block_id, used)))
        assert size == length == BLOCK_BYTES, f"block {block_id}: {size} bytes, row says {length}"
        assert block_id not in out, f"block {block_id} is stored twice"
        out[block_id] = digest
    return out


def pool_level(node: NodeProcess, pki: PkiFiles) -> dict[str, object]:
    with OperatorClient(node.url, identity(pki, "ops-ada")) as ops:
        return ops.pool(LINK)


class RecordingRandom:
    """Stands in for ``os.urandom`` as the emulator's source of key bytes: returns real
    random bytes and keeps only their SHA-256 digests."""

    def __init__(self) -> None:
        self.digests: list[str] = []

    def __call__(self, n: int) -> bytes:
        key = os.urandom(n)
        self.digests.append(hashlib.sha256(key).hexdigest())
        return key


def link_spec(net: Network, pki: PkiFiles) -> LinkSpec:
    module = identity(pki, "mod-link-a")
    return LinkSpec(
        link_id=LINK,
        relay_url=net.relay.url,
        station_url=net.station.url,
        relay_identity=module,
        station_identity=module,
        model=ModelParams(base_rate_bps=RATE_BPS, day_factor=1.0, mean_cloud_s=0.0),
        seed=7,
        block_bytes=BLOCK_BYTES,
    )


def emulator(net: Network, pki: PkiFiles, keys: RecordingRandom, **kw: object) -> LinkEmulator:
    options: dict[str, object] = {
        "time_scale": 3600.0,
        "start": START.timestamp(),
        "tick_seconds": 0.05,
        "push_interval_seconds": 0.2,
        "batch_max_blocks": 32,
        "drain_seconds": 15.0,
        "urandom": keys,
    }
    options.update(kw)
    return LinkEmulator([link_spec(net, pki)], **options)  # type: ignore[arg-type]


def assert_both_ends_hold_what_was_made(net: Network, keys: RecordingRandom) -> dict[str, str]:
    relay, station = stored_blocks(net.relay), stored_blocks(net.station)
    assert set(relay) == set(station), (
        f"block IDs differ: {len(set(relay) - set(station))} only at the relay, "
        f"{len(set(station) - set(relay))} only at the station"
    )
    differing = [b for b in relay if relay[b] != station[b]]
    assert not differing, f"{len(differing)} block(s) hold different key bytes at the two ends"
    assert Counter(relay.values()) == Counter(keys.digests), (
        "the nodes do not hold exactly the key the module made"
    )
    return relay


# ---------------------------------------------------------------- a clean run


def test_both_ends_hold_identical_blocks_and_pools_match_stats(
    network: Network, pki: PkiFiles
) -> None:
    keys = RecordingRandom()
    duration = 3.0
    stats = asyncio.run(emulator(network, pki, keys).run(duration))[LINK]

    expected = RATE_BPS * duration / BLOCK_BITS
    assert 0.5 * expected <= stats.blocks_generated <= 1.5 * expected, stats
    assert stats.blocks_generated == len(keys.digests)
    assert stats.blocks_discarded == 0
    blocks = assert_both_ends_hold_what_was_made(network, keys)
    assert len(blocks) == stats.blocks_generated

    for name, node in network.ends():
        end = stats.end(name)
        assert (end.errors, end.rejected, end.duplicates, end.backlog) == (0, 0, 0, 0), (
            f"{name} end: {end.last_error}"
        )
        assert end.blocks_acked == end.blocks_accepted == stats.blocks_generated
        assert end.bits_accepted == BLOCK_BITS * stats.blocks_generated
        pool = pool_level(node, pki)
        assert pool["bits_received"] == pool["bits_available"] == end.bits_accepted, name
        assert pool["bits_used"] == 0
        assert pool["blocks_available"] == end.blocks_accepted
        assert pool["last_block_at"] is not None


# ---------------------------------------------------------------- an outage


class LoseOneAnswer(httpx.AsyncBaseTransport):
    """Delivers every request, but throws away the node's answer to push number
    ``which`` and raises a read error instead: the node stored the batch and the module
    does not know it, so it sends the batch again."""

    def __init__(self, inner: httpx.AsyncBaseTransport, which: int) -> None:
        self.inner = inner
        self.which = which
        self.pushes = 0
        #: Blocks the node accepted in the push whose answer was lost.
        self.lost_blocks = 0

    async def handle_async_request(self, request: httpx.Request) -> httpx.Response:
        response = await self.inner.handle_async_request(request)
        if request.url.path.endswith("/blocks"):
            self.pushes += 1
            if self.pushes == self.which:
                await response.aread()
                await response.aclose()
                assert response.status_code == 200, response.status_code
                self.lost_blocks = int(response.json()["accepted"])
                raise httpx.ReadError("answer lost on the way back (injected)", request=request)
        return response

    async def aclose(self) -> None:
        await self.inner.aclose()


async def _until(what: str, check: Callable[[], bool], timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout} s waiting for {what}")
        await asyncio.sleep(0.05)


def test_station_restart_mid_run_drains_the_backlog_and_duplicates_are_harmless(
    sqlite_network: Network, pki: PkiFiles
) -> None:
    net = sqlite_network
    keys = RecordingRandom()
    module = identity(pki, "mod-link-a")
    lossy = LoseOneAnswer(httpx.AsyncHTTPTransport(verify=module.ssl_context()), which=2)
    made: list[httpx.AsyncClient] = []

    def clients(url: str, ident: TlsIdentity | None) -> AsyncModuleClient:
        if url != net.station.url:
            return AsyncModuleClient(url, ident, attempts=1)
        http = httpx.AsyncClient(transport=lossy, timeout=10.0)
        made.append(http)
        return AsyncModuleClient(url, client=http, attempts=1)

    # JSON form here, binary in the clean run: both reach the nodes for real.
    emu = emulator(net, pki, keys, client_factory=clients, binary=False)

    def now() -> LinkStats:
        return emu.stats[LINK]

    async def scenario() -> tuple[LinkStats, LinkStats]:
        run = asyncio.create_task(emu.run())
        try:
            await _until(
                "the station to take some key",
                lambda: lossy.lost_blocks > 0 and now().station.blocks_acked >= 20,
                15,
            )
            await asyncio.to_thread(net.station.stop)
            down = now()
            await _until(
                "a failed push to the stopped station while the relay keeps taking key",
                lambda: (
                    now().station.errors > down.station.errors
                    and now().relay.blocks_acked > down.relay.blocks_acked
                ),
                15,
            )
            outage = now()
            await asyncio.to_thread(net.station.start, pki)
            back = datetime.now(UTC)
            await _until(
                "a push to the restarted station",
                lambda: (at := now().station.last_push_at) is not None and at > back,
                20,
            )
        finally:
            emu.stop()
            final = await run
            for http in made:
                await http.aclose()
        return outage, final[LINK]

    outage, stats = asyncio.run(scenario())

    # The outage was real: the station fell behind while the relay kept up.
    assert outage.station.backlog > 0
    assert outage.relay.blocks_acked > outage.station.blocks_acked
    # Afterwards every block reached both ends, once.
    assert stats.blocks_discarded == 0
    assert stats.relay.backlog == stats.station.backlog == 0
    blocks = assert_both_ends_hold_what_was_made(net, keys)
    assert len(blocks) == stats.blocks_generated > outage.blocks_generated
    # The relay saw a clean run; the station saw the outage and the lost answer.
    assert (stats.relay.errors, stats.relay.duplicates, stats.relay.rejected) == (0, 0, 0)
    assert stats.relay.blocks_accepted == stats.blocks_generated
    assert stats.station.rejected == 0
    assert stats.station.errors >= 2
    assert stats.station.duplicates >= lossy.lost_blocks >= 1
    assert stats.station.blocks_acked == stats.blocks_generated
    assert stats.station.blocks_accepted + stats.station.duplicates >= stats.blocks_generated
    # Re-sent blocks did not inflate either pool.
    for name, node in net.ends():
        pool = pool_level(node, pki)
        assert pool["bits_received"] == BLOCK_BITS * stats.blocks_generated, name
        assert pool["blocks_available"] == stats.blocks_generated, name
    assert stats.relay.bits_accepted == BLOCK_BITS * stats.blocks_generated


# ---------------------------------------------------------------- the CLI

#: Runs of characters that could be key bytes written out: Base64 (RFC 4648 sections 4
#: and 5), hexadecimal, or a Python bytes repr.
KEYLIKE = (
    re.compile(r"[A-Za-z0-9+/]{32,}"),
    re.compile(r"[A-Za-z0-9_-]{32,}"),
    re.compile(r"[0-9A-Fa-f]{32,}"),
    re.compile(r"(?:\\x[0-9A-Fa-f]{2}){8,}"),
)


def _redact(text: str) -> str:
    for pattern in KEYLIKE:
        text = pattern.sub(lambda m: f"<{len(m.group())} key-like chars>", text)
    return text


def _keystrata_links() -> str:
    script = Path(sys.executable).with_name("keystrata-links")
    assert script.is_file(), f"console script {script} is not installed (pip install -e .)"
    return str(script)


def test_cli_pushes_to_both_ends_and_prints_no_key_bytes(
    sqlite_network: Network, pki: PkiFiles, tmp_path: Path
) -> None:
    net = sqlite_network
    config = tmp_path / "links.toml"
    config.write_text(f"""
[emulator]
time_scale = 3600.0
start = 2026-06-21T00:00:00Z
tick_seconds = 0.05
push_interval_seconds = 0.2
summary_seconds = 1.0
drain_seconds = 15.0

[defaults]
ca = "{pki.ca}"
cert = "{pki.cert("mod-link-a")}"
key = "{pki.key("mod-link-a")}"

[[link]]
link_id = "{LINK}"
relay_url = "{net.relay.url}"
station_url = "{net.station.url}"
base_rate_bps = 200000.0
day_factor = 1.0
mean_cloud_s = 0.0
block_bytes = {BLOCK_BYTES}
""")
    # -vv logs every request too: more output in which a key could slip out.
    result = subprocess.run(
        [_keystrata_links(), "--config", str(config), "--duration", "3", "-vv"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    output = result.stdout + result.stderr
    assert result.returncode == 0, _redact(output)[-3000:]

    for pattern in KEYLIKE:
        runs = [len(m.group()) for m in pattern.finditer(output)]
        assert not runs, f"output holds {len(runs)} key-like run(s) of lengths {runs[:10]}"

    summaries = [line for line in result.stdout.splitlines() if f" {LINK} " in line]
    assert summaries, "no summary line names the link"
    final = re.search(r"relay acked (\d+) .* station acked (\d+) ", summaries[-1])
    assert final is not None, summaries[-1]
    relay_acked, station_acked = map(int, final.groups())

    relay, station = stored_blocks(net.relay), stored_blocks(net.station)
    assert relay == station
    assert relay_acked == station_acked == len(relay) > 0
    for _, node in net.ends():
        assert pool_level(node, pki)["bits_received"] == BLOCK_BITS * len(relay)
