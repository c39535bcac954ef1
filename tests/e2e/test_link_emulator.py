"""End to end: the link emulator pushes identical blocks to a real relay and a real station.

Two ``keystrata serve`` processes (``relay-1`` and ``station-a``) run on loopback with
mutual TLS, each on its own database, both provisioned through ``OperatorClient`` with
QKD links between them and one QKD module principal per link (``mod-link-a`` for
``link-a``, ...). The emulator (``keystrata_client.emulators``) plays a module and pushes
to both ends. Node processes are slow to start, so each backend's pair of nodes is
started once for this module; every test has a link of its own, so no test sees the
blocks of another.

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

from conftest import _pg_admin, _pg_url
from keystrata.config import load_settings
from keystrata.crypto.pki import PkiDir, issue_client_cert
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, prepare_node
from keystrata.node.lifecycle import load_keyring
from keystrata.storage.db import Database
from keystrata.storage.models import LinkBlock
from keystrata.storage.sealed import block_context
from keystrata_client import AsyncModuleClient, OperatorClient, TlsIdentity
from keystrata_client.emulators import LinkEmulator, LinkSpec, LinkStats, ModelParams

#: The link each test pushes on, and the client certificate of its QKD module.
MODULES = {"link-a": "mod-link-a", "link-b": "mod-link-b", "link-c": "mod-link-c"}
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
    """A running relay and station joined by the links of :data:`MODULES`."""

    relay: NodeProcess
    station: NodeProcess
    modules: dict[str, TlsIdentity]

    def ends(self) -> tuple[tuple[str, NodeProcess], ...]:
        return (("relay", self.relay), ("station", self.station))

    def ensure_running(self, pki: PkiFiles) -> Network:
        # A test that stops a node and fails before restarting it must not take the
        # tests after it down too.
        for _, node in self.ends():
            if node.proc is None or node.proc.poll() is not None:
                node.stop()
                node.start(pki)
        return self


def _provision(node: NodeProcess, peer: NodeProcess, pki: PkiFiles) -> None:
    peer_role = "relay" if peer.node_id == "relay-1" else "station"
    with OperatorClient(node.url, identity(pki, "ops-ada")) as ops:
        ops.create("nodes", {"node_id": peer.node_id, "role": peer_role, "url": peer.url})
        for link_id, module in MODULES.items():
            ops.create(
                "links", {"link_id": link_id, "relay_id": "relay-1", "station_id": "station-a"}
            )
            ops.create(
                "principals",
                {
                    "principal_id": module,
                    "role": "qkd-module",
                    "cert_subject": module,
                    "link_id": link_id,
                },
            )


@contextmanager
def running_network(
    folder: Path, pki: PkiFiles, modules: dict[str, TlsIdentity], relay_db: str, station_db: str
) -> Iterator[Network]:
    """Initialise, start and provision both nodes (the two in parallel); stop them after."""
    with ThreadPoolExecutor(2) as pool:
        relay_job = pool.submit(prepare_node, folder / "relay-1", pki, "relay-1", "relay", relay_db)
        station_job = pool.submit(
            prepare_node, folder / "station-a", pki, "station-a", "station", station_db
        )
        net = Network(relay=relay_job.result(), station=station_job.result(), modules=modules)
    try:
        with ThreadPoolExecutor(2) as pool:
            list(pool.map(lambda node: node.start(pki), (net.relay, net.station)))
        _provision(net.relay, net.station, pki)
        _provision(net.station, net.relay, pki)
        yield net
    finally:
        net.relay.stop()
        net.station.stop()


@pytest.fixture(scope="module")
def modules(pki: PkiFiles, tmp_path_factory: pytest.TempPathFactory) -> dict[str, TlsIdentity]:
    """The QKD module identity of every link; the session PKI lacks ``mod-link-c``, so it
    is issued here by the same CA, into a folder of this module's own."""
    folder = tmp_path_factory.mktemp("modules")
    issued = issue_client_cert(PkiDir(pki.dir).load_ca(), "mod-link-c", "qkd-module")
    cert, key = folder / "mod-link-c.crt", folder / "mod-link-c.key"
    cert.write_bytes(issued.cert_pem)
    key.touch(mode=0o600)
    key.write_bytes(issued.key_pem)
    out = {link: identity(pki, name) for link, name in MODULES.items() if name != "mod-link-c"}
    out["link-c"] = TlsIdentity(ca=pki.ca, cert=cert, key=key)
    return out


@pytest.fixture(scope="module")
def sqlite_network(
    pki: PkiFiles,
    modules: dict[str, TlsIdentity],
    sqlite_template: Path,
    tmp_path_factory: pytest.TempPathFactory,
) -> Iterator[Network]:
    """Both nodes on SQLite files."""
    folder = tmp_path_factory.mktemp("sqlite-network")
    dbs = [shutil.copy(sqlite_template, folder / f"{n}.db") for n in ("relay", "station")]
    with running_network(folder, pki, modules, *(f"sqlite:///{db}" for db in dbs)) as net:
        yield net


@pytest.fixture(scope="module")
def postgresql_network(
    pki: PkiFiles,
    modules: dict[str, TlsIdentity],
    pg_template: str | None,
    tmp_path_factory: pytest.TempPathFactory,
) -> Iterator[Network]:
    """Both nodes on PostgreSQL, each on a database of its own cloned from the migrated
    template (as conftest's ``db_url`` does); skipped without a server, unless CI is set."""
    if pg_template is None:
        pytest.skip("no PostgreSQL server (set CI=1 to make this a failure)")
    names = [f"ks_t_{os.getpid()}_{n}_{uuid.uuid4().hex[:8]}" for n in ("relay", "station")]
    with _pg_admin() as admin:
        for name in names:
            admin.execute(f'CREATE DATABASE "{name}" TEMPLATE "{pg_template}"')
    try:
        folder = tmp_path_factory.mktemp("postgresql-network")
        with running_network(folder, pki, modules, *(_pg_url(n) for n in names)) as net:
            yield net
    finally:
        with _pg_admin() as admin:
            for name in names:
                admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@pytest.fixture(params=["sqlite", "postgresql"])
def network(request: pytest.FixtureRequest, pki: PkiFiles) -> Network:
    """The module's pair of nodes on each backend."""
    net: Network = request.getfixturevalue(f"{request.param}_network")
    return net.ensure_running(pki)


@pytest.fixture
def sqlite_nodes(sqlite_network: Network, pki: PkiFiles) -> Network:
    """The module's pair of nodes on SQLite, for tests that need one backend only."""
    return sqlite_network.ensure_running(pki)


# ---------------------------------------------------------------- what the nodes hold


def _digest(key: bytes) -> tuple[str, int]:
    # The only place a stored key is seen: hashed and measured, then dropped.
    return hashlib.sha256(key).hexdigest(), len(key)


def stored_blocks(node: NodeProcess, link_id: str) -> dict[str, str]:
    """Return block ID -> SHA-256 (hex) of the key bytes, for every block of ``link_id``
    in ``node``'s database, each opened with the node's KEK and its row's context."""
    settings = load_settings(node.config, env={})
    keyring = load_keyring(settings)
    db = Database.from_url(settings.database.url)
    try:
        with db.read() as s:
            rows = s.execute(
                select(LinkBlock.block_id, LinkBlock.used, LinkBlock.length, LinkBlock.sealed)
                .where(LinkBlock.link_id == link_id)
                .order_by(LinkBlock.seq)
            ).all()
    finally:
        db.dispose()
    out: dict[str, str] = {}
    for block_id, used, length, sealed in rows:
        # No relay operation ran, so every block is still whole.
        assert used == 0, f"block {block_id} was consumed"
        assert sealed is not None, f"block {block_id} has no sealed bytes"
        digest, size = _digest(keyring.open(sealed, block_context(link_id, block_id, used)))
        assert size == length == BLOCK_BYTES, f"block {block_id}: {size} bytes, row says {length}"
        assert block_id not in out, f"block {block_id} is stored twice"
        out[block_id] = digest
    return out


def pool_level(node: NodeProcess, pki: PkiFiles, link_id: str) -> dict[str, object]:
    with OperatorClient(node.url, identity(pki, "ops-ada")) as ops:
        return ops.pool(link_id)


class RecordingRandom:
    """Stands in for ``os.urandom`` as the emulator's source of key bytes: returns real
    random bytes and keeps only their SHA-256 digests."""

    def __init__(self) -> None:
        self.digests: list[str] = []

    def __call__(self, n: int) -> bytes:
        key = os.urandom(n)
        self.digests.append(hashlib.sha256(key).hexdigest())
        return key


def link_spec(net: Network, link_id: str) -> LinkSpec:
    module = net.modules[link_id]
    return LinkSpec(
        link_id=link_id,
        relay_url=net.relay.url,
        station_url=net.station.url,
        relay_identity=module,
        station_identity=module,
        model=ModelParams(base_rate_bps=RATE_BPS, day_factor=1.0, mean_cloud_s=0.0),
        seed=7,
        block_bytes=BLOCK_BYTES,
    )


def emulator(net: Network, link_id: str, keys: RecordingRandom, **kw: object) -> LinkEmulator:
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
    return LinkEmulator([link_spec(net, link_id)], **options)  # type: ignore[arg-type]


def assert_both_ends_hold_what_was_made(
    net: Network, link_id: str, keys: RecordingRandom
) -> dict[str, str]:
    relay, station = stored_blocks(net.relay, link_id), stored_blocks(net.station, link_id)
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
    link = "link-a"
    keys = RecordingRandom()
    duration = 3.0
    stats = asyncio.run(emulator(network, link, keys).run(duration))[link]

    expected = RATE_BPS * duration / BLOCK_BITS
    assert 0.5 * expected <= stats.blocks_generated <= 1.5 * expected, stats
    assert stats.blocks_generated == len(keys.digests)
    assert stats.blocks_discarded == 0
    blocks = assert_both_ends_hold_what_was_made(network, link, keys)
    assert len(blocks) == stats.blocks_generated

    for name, node in network.ends():
        end = stats.end(name)
        assert (end.errors, end.rejected, end.duplicates, end.backlog) == (0, 0, 0, 0), (
            f"{name} end: {end.last_error}"
        )
        assert end.blocks_acked == end.blocks_accepted == stats.blocks_generated
        assert end.bits_accepted == BLOCK_BITS * stats.blocks_generated
        pool = pool_level(node, pki, link)
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
    sqlite_nodes: Network, pki: PkiFiles
) -> None:
    net, link = sqlite_nodes, "link-b"
    keys = RecordingRandom()
    module = net.modules[link]
    lossy = LoseOneAnswer(httpx.AsyncHTTPTransport(verify=module.ssl_context()), which=2)
    made: list[httpx.AsyncClient] = []

    def clients(url: str, ident: TlsIdentity | None) -> AsyncModuleClient:
        if url != net.station.url:
            return AsyncModuleClient(url, ident, attempts=1)
        http = httpx.AsyncClient(transport=lossy, timeout=10.0)
        made.append(http)
        return AsyncModuleClient(url, client=http, attempts=1)

    # JSON form here, binary in the clean run: both reach the nodes for real.
    emu = emulator(net, link, keys, client_factory=clients, binary=False)

    def now() -> LinkStats:
        return emu.stats[link]

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
        return outage, final[link]

    outage, stats = asyncio.run(scenario())

    # The outage was real: the station fell behind while the relay kept up.
    assert outage.station.backlog > 0
    assert outage.relay.blocks_acked > outage.station.blocks_acked
    # Afterwards every block reached both ends, once.
    assert stats.blocks_discarded == 0
    assert stats.relay.backlog == stats.station.backlog == 0
    blocks = assert_both_ends_hold_what_was_made(net, link, keys)
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
        pool = pool_level(node, pki, link)
        assert pool["bits_received"] == BLOCK_BITS * stats.blocks_generated, name
        assert pool["blocks_available"] == stats.blocks_generated, name
    assert stats.relay.bits_accepted == BLOCK_BITS * stats.blocks_generated


# ---------------------------------------------------------------- the CLI

#: Runs of characters that could be key bytes written out: Base64 (RFC 4648 sections 4
#: and 5), hexadecimal, or a Python bytes repr. In a repr about a third of random bytes
#: print as themselves, so escapes may have up to four other characters between them.
KEYLIKE = (
    re.compile(r"[A-Za-z0-9+/]{32,}"),
    re.compile(r"[A-Za-z0-9_-]{32,}"),
    re.compile(r"[0-9A-Fa-f]{32,}"),
    re.compile(r"(?:\\x[0-9A-Fa-f]{2}(?:\\[ntr\\'\"]|[^\\\n]){0,4}){8,}"),
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
    sqlite_nodes: Network, pki: PkiFiles, tmp_path: Path
) -> None:
    net, link = sqlite_nodes, "link-c"
    module = net.modules[link]
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
ca = "{module.ca}"
cert = "{module.cert}"
key = "{module.key}"

[[link]]
link_id = "{link}"
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

    summaries = [line for line in result.stdout.splitlines() if f" {link} " in line]
    assert summaries, "no summary line names the link"
    final = re.search(r"relay acked (\d+) .* station acked (\d+) ", summaries[-1])
    assert final is not None, summaries[-1]
    relay_acked, station_acked = map(int, final.groups())

    relay, station = stored_blocks(net.relay, link), stored_blocks(net.station, link)
    assert relay == station
    assert relay_acked == station_acked == len(relay) > 0
    for _, node in net.ends():
        assert pool_level(node, pki, link)["bits_received"] == BLOCK_BITS * len(relay)
