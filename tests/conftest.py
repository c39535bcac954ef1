"""Shared fixtures: a test PKI made at run time, real databases (SQLite and PostgreSQL),
initialised nodes, and API clients that present a given client certificate.

PostgreSQL: every test gets its own database cloned from a migrated template. Without a
server the PostgreSQL half of the suite is skipped locally; with ``CI`` set it fails.
"""

from __future__ import annotations

import itertools
import os
import queue
import shutil
import threading
import time
import uuid
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import psycopg
import pytest
from anyio.from_thread import BlockingPortal, start_blocking_portal

from keystrata.config import Settings, load_settings
from keystrata.context import NodeContext
from keystrata.loopback.configs import write_config
from keystrata.loopback.pki import PkiFiles, cert_pin, make_pki
from keystrata.node.lifecycle import initialise, load_keyring, open_node
from keystrata.storage import migrate
from keystrata.storage.db import Database, make_engine

PG_URL = os.environ.get(
    "KEYSTRATA_TEST_PG_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/postgres"
)
_counter = itertools.count()

#: The tiers of the suite are its folders; each test carries its folder's marker, and the
#: processes tier also ``e2e`` (real server processes over mutual TLS on loopback).
TIERS = ("unit", "storage", "api", "e2e")


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    root = Path(__file__).parent
    for item in items:
        tier = item.path.relative_to(root).parts[0]
        if tier in TIERS:
            item.add_marker(tier)
    # Tests marked one_backend check what no database changes (a page drawn from the
    # routes, rules applied before any route): their PostgreSQL half is left out.
    twice = [
        item
        for item in items
        if item.get_closest_marker("one_backend") is not None
        and getattr(item, "callspec", None) is not None
        and item.callspec.params.get("db_factory") == "postgresql"  # type: ignore[attr-defined]
    ]
    if twice:
        config.hook.pytest_deselected(items=twice)
        items[:] = [item for item in items if item not in twice]


# ---------------------------------------------------------------- PKI


@dataclass(frozen=True)
class SuitePki(PkiFiles):
    """The suite's PKI, and a folder of a foreign CA (certificates our CA never issued)."""

    foreign_dir: Path


#: Client certificates of the test PKI: name -> role written in the certificate.
CLIENTS = {
    "ops-ada": "operator",
    "aud-ben": "auditor",
    "mon-cal": "monitor",
    "mod-link-a": "qkd-module",
    "mod-link-b": "qkd-module",
    "sae-a1": "sae",
    "sae-a2": "sae",
    "sae-b1": "sae",
    "sae-b2": "sae",
    "stranger": "operator",  # issued by our CA but never registered as a principal
}
NODES = ("relay-1", "station-a", "station-b", "station-c")
#: Peers present node certificates (only those carry the node marker): ``peer-relay``,
#: the peer caller of the API tests, is relay-1's node certificate under another name.
PEER_ALIASES = {"peer-relay": "relay-1"}


@pytest.fixture(scope="session")
def pki(tmp_path_factory: pytest.TempPathFactory) -> SuitePki:
    base = tmp_path_factory.mktemp("pki")
    ours = make_pki(base / "ca", "Test Network CA", NODES, CLIENTS)
    for alias, node in PEER_ALIASES.items():
        for suffix in (".crt", ".key"):
            shutil.copy(ours.dir / f"{node}{suffix}", ours.dir / f"{alias}{suffix}")
    # Same subject as our operator, wrong CA.
    foreign = make_pki(base / "foreign", "Some Other CA", (), {"ops-ada": "operator"})
    return SuitePki(dir=ours.dir, foreign_dir=foreign.dir)


# ---------------------------------------------------------------- databases


def _pg_admin() -> psycopg.Connection[Any]:
    url = PG_URL.replace("postgresql+psycopg://", "postgresql://")
    return psycopg.connect(url, autocommit=True, connect_timeout=3)


def _pg_url(dbname: str) -> str:
    return PG_URL.rsplit("/", 1)[0] + "/" + dbname


class _PgClones:
    """Clones of the migrated template, made ahead and dropped behind the tests.

    Why: on PostgreSQL 15 every ``DROP DATABASE`` waits for a forced checkpoint of the
    whole server (about a second on a busy machine) and every ``CREATE DATABASE ...
    TEMPLATE`` copies the template through the WAL; with one to three databases per test
    that waiting was a third of ``make test``. Here a thread keeps a few clones ready, and
    used databases are dropped by a thread too, several at once (concurrent drops share
    one checkpoint), while the next tests run. Each clone is still handed out once, fresh
    from the template; the session waits for every drop before it ends.
    """

    READY = 3  # clones kept ready: a test takes at most three

    def __init__(self, template: str) -> None:
        self.template = template
        self._ready: queue.Queue[str] = queue.Queue()
        self._doomed: queue.Queue[str | None] = queue.Queue()
        self._stop = threading.Event()
        self._failures: list[str] = []
        self._wanted = threading.Semaphore(self.READY)
        self._threads = [
            threading.Thread(target=self._fill, name="pg-clone-maker", daemon=True),
            threading.Thread(target=self._drain, name="pg-clone-dropper", daemon=True),
        ]
        for t in self._threads:
            t.start()

    def _create(self) -> str:
        name = f"ks_t_{os.getpid()}_{next(_counter)}"
        with _pg_admin() as admin:
            admin.execute(f'CREATE DATABASE "{name}" TEMPLATE "{self.template}"')
        return name

    def _fill(self) -> None:
        while not self._stop.is_set():
            if not self._wanted.acquire(timeout=0.2):
                continue
            if self._stop.is_set():
                return
            try:
                self._ready.put(self._create())
            except psycopg.Error:
                self._wanted.release()  # take() makes one itself if none is ready
                time.sleep(0.5)

    def take(self) -> str:
        """A fresh clone of the template, never handed out before."""
        try:
            name = self._ready.get_nowait()
        except queue.Empty:
            return self._create()
        self._wanted.release()
        return name

    def drop_later(self, names: list[str]) -> None:
        for name in names:
            self._doomed.put(name)

    def _drain(self) -> None:
        with ThreadPoolExecutor(4, thread_name_prefix="pg-drop") as pool:
            while True:
                batch = [self._doomed.get()]
                while True:
                    try:
                        batch.append(self._doomed.get_nowait())
                    except queue.Empty:
                        break
                names = [n for n in batch if n is not None]
                for name, problem in zip(names, pool.map(_drop_database, names), strict=True):
                    if problem:
                        self._failures.append(f"{name}: {problem}")
                if None in batch:
                    return

    def close(self) -> None:
        """Stop making clones; drop the unused ones and wait for every drop."""
        self._stop.set()
        self._threads[0].join()
        while not self._ready.empty():
            self._doomed.put(self._ready.get_nowait())
        self._doomed.put(None)
        self._threads[1].join()
        assert not self._failures, f"test databases left behind: {self._failures}"


def _drop_database(name: str) -> str:
    """Drop a test database; return the problem, if any (the dropper thread goes on)."""
    try:
        with _pg_admin() as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
    except psycopg.Error as exc:
        return str(exc)
    return ""


@pytest.fixture(scope="session")
def pg_clones() -> Iterator[_PgClones | None]:
    try:
        admin = _pg_admin()
    except psycopg.OperationalError as exc:
        if os.environ.get("CI"):
            pytest.fail(f"CI requires PostgreSQL at {PG_URL}: {exc}")
        yield None
        return
    name = f"ks_tpl_{os.getpid()}"
    with admin:
        admin.execute(f'DROP DATABASE IF EXISTS "{name}"')
        admin.execute(f'CREATE DATABASE "{name}"')
    engine = make_engine(_pg_url(name))
    migrate.upgrade(engine)
    engine.dispose()
    clones = _PgClones(name)
    try:
        yield clones
    finally:
        clones.close()
        with _pg_admin() as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@pytest.fixture(scope="session")
def pg_template(pg_clones: _PgClones | None) -> str | None:
    """Name of the migrated template database (None: no PostgreSQL server)."""
    return None if pg_clones is None else pg_clones.template


@pytest.fixture(scope="session")
def sqlite_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("tpl") / "template.db"
    engine = make_engine(f"sqlite:///{path}")
    migrate.upgrade(engine)
    with engine.connect() as conn:
        conn.exec_driver_sql("PRAGMA wal_checkpoint(TRUNCATE)")
    engine.dispose()
    return path


@pytest.fixture(params=["sqlite", "postgresql"])
def db_factory(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Callable[[], str]]:
    """Make fresh, migrated databases of one backend (each test runs once per backend)."""
    if request.param == "postgresql":
        yield from _pg_databases(request)
        return
    template_file = request.getfixturevalue("sqlite_template")

    def make() -> str:
        path = tmp_path / f"node-{next(_counter)}.db"
        shutil.copy(template_file, path)
        return f"sqlite:///{path}"

    yield make


def _pg_databases(request: pytest.FixtureRequest) -> Iterator[Callable[[], str]]:
    clones: _PgClones | None = request.getfixturevalue("pg_clones")
    if clones is None:
        pytest.skip(f"no PostgreSQL at {PG_URL} (set CI=1 to make this a failure)")
    made: list[str] = []

    def make() -> str:
        made.append(clones.take())
        return _pg_url(made[-1])

    yield make
    clones.drop_later(made)


@pytest.fixture
def pg_factory(request: pytest.FixtureRequest) -> Iterator[Callable[[], str]]:
    """Make fresh, migrated PostgreSQL databases (for tests that need PostgreSQL)."""
    yield from _pg_databases(request)


@contextmanager
def database_for(request: pytest.FixtureRequest, backend: str, folder: Path) -> Iterator[str]:
    """One fresh, migrated database of ``backend`` for a fixture of any scope (as
    ``db_factory`` makes them for one test); skipped without PostgreSQL, unless CI."""
    if backend == "sqlite":
        path = folder / f"node-{next(_counter)}.db"
        shutil.copy(request.getfixturevalue("sqlite_template"), path)
        yield f"sqlite:///{path}"
        return
    clones: _PgClones | None = request.getfixturevalue("pg_clones")
    if clones is None:
        pytest.skip(f"no PostgreSQL at {PG_URL} (set CI=1 to make this a failure)")
    name = clones.take()
    try:
        yield _pg_url(name)
    finally:
        clones.drop_later([name])


@pytest.fixture
def db_url(db_factory: Callable[[], str]) -> str:
    """URL of a fresh, migrated database of each backend."""
    return db_factory()


# ---------------------------------------------------------------- nodes


@dataclass
class Node:
    settings: Settings
    config_path: Path
    ctx: NodeContext


NodeFactory = Callable[..., Node]


@pytest.fixture
def make_node(tmp_path: Path, pki: PkiFiles) -> Iterator[NodeFactory]:
    made: list[Database] = []

    def factory(
        node_id: str = "station-a", role: str = "station", *, db_url: str, extra: str = ""
    ) -> Node:
        path = write_config(
            tmp_path / node_id, node_id=node_id, role=role, db_url=db_url, pki=pki, extra=extra
        )
        settings = load_settings(path, env={})
        db = Database.from_url(settings.database.url, sqlite_synchronous="NORMAL")
        made.append(db)
        initialise(settings, db, load_keyring(settings))
        return Node(settings=settings, config_path=path, ctx=open_node(settings, db))

    yield factory
    for db in made:
        db.dispose()


def seed_registry(ctx: NodeContext) -> None:
    """Provision a small network on one node: the relay, three stations, links to two of
    them, and one principal per test client certificate."""
    from keystrata.registry import provisioning
    from keystrata.registry.specs import Kind, LinkSpec, NodeSpec, PrincipalSpec

    nodes = [
        ("relay-1", "relay"),
        ("station-a", "station"),
        ("station-b", "station"),
        ("station-c", "station"),
    ]
    for node_id, role in nodes:
        if node_id != ctx.node_id:
            provisioning.create(
                ctx,
                Kind.NODES,
                NodeSpec.model_validate(
                    {"node_id": node_id, "role": role, "url": f"https://127.0.0.1/{node_id}"}
                ),
                actor="test",
            )
    for link, station in (("link-a", "station-a"), ("link-b", "station-b")):
        provisioning.create(
            ctx,
            Kind.LINKS,
            LinkSpec(link_id=link, relay_id="relay-1", station_id=station),
            actor="test",
        )
    pki_dir = ctx.settings.tls.cert.parent  # the test PKI's folder
    principals: list[dict[str, Any]] = [
        {
            "principal_id": "ops-ada",
            "role": "operator",
            "cert_subject": "ops-ada",
            "cert_sha256": cert_pin(pki_dir, "ops-ada"),
        },
        {"principal_id": "aud-ben", "role": "auditor", "cert_subject": "aud-ben"},
        {"principal_id": "mon-cal", "role": "monitor", "cert_subject": "mon-cal"},
        {
            "principal_id": "mod-link-a",
            "role": "qkd-module",
            "cert_subject": "mod-link-a",
            "link_id": "link-a",
        },
        {
            "principal_id": "mod-link-b",
            "role": "qkd-module",
            "cert_subject": "mod-link-b",
            "link_id": "link-b",
        },
        {
            "principal_id": "sae-a1",
            "role": "sae",
            "cert_subject": "sae-a1",
            "station_id": "station-a",
        },
        {
            "principal_id": "peer-relay",
            "role": "peer",
            "cert_subject": "relay-1",
            "cert_sha256": cert_pin(pki_dir, "relay-1"),
            "node_id": "relay-1",
        },
    ]
    principals.append(
        {
            "principal_id": "sae-c1",
            "role": "sae",
            "cert_subject": "sae-c1",
            "station_id": "station-c",
        }
    )
    for body in principals:
        provisioning.create(ctx, Kind.PRINCIPALS, PrincipalSpec.model_validate(body), actor="test")
    # One pair, so that every route has something real to answer about.
    from keystrata.registry.specs import PairSpec

    provisioning.create(
        ctx,
        Kind.PAIRS,
        PairSpec(pair_id="pair-ac", relay_id="relay-1", stations=["station-a", "station-c"]),
        actor="test",
    )


@pytest.fixture
def station(make_node: NodeFactory, db_url: str) -> Node:
    """Station ``station-a`` with the test network provisioned, on each backend."""
    node = make_node("station-a", "station", db_url=db_url)
    seed_registry(node.ctx)
    return node


@pytest.fixture
def relay(make_node: NodeFactory, db_url: str) -> Node:
    """Relay ``relay-1`` with the test network provisioned, on each backend."""
    node = make_node("relay-1", "relay", db_url=db_url)
    seed_registry(node.ctx)
    return node


# ---------------------------------------------------------------- API clients


class _WithClientCert:
    """ASGI wrapper standing in for the TLS layer: puts a client certificate into the
    scope's TLS extension, as keystrata's uvicorn protocol does after a handshake."""

    def __init__(self, app: Any, pem: str | None) -> None:
        self.app = app
        self.pem = pem

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        if scope["type"] == "http" and self.pem is not None:
            scope["extensions"] = {
                **(scope.get("extensions") or {}),
                "tls": {"client_cert_chain": [self.pem]},
            }
        await self.app(scope, receive, send)


class AsgiClient:
    """A blocking facade over ``httpx.AsyncClient`` with ``httpx.ASGITransport``, so API
    tests read like plain httpx calls while the app runs in-process."""

    def __init__(self, portal: BlockingPortal, app: Any) -> None:
        self._portal = portal
        self._client = httpx.AsyncClient(
            transport=httpx.ASGITransport(app=app), base_url="https://testserver"
        )

    def request(self, method: str, url: str, **kw: Any) -> httpx.Response:
        return self._portal.call(lambda: self._client.request(method, url, **kw))

    def get(self, url: str, **kw: Any) -> httpx.Response:
        return self.request("GET", url, **kw)

    def post(self, url: str, **kw: Any) -> httpx.Response:
        return self.request("POST", url, **kw)

    def patch(self, url: str, **kw: Any) -> httpx.Response:
        return self.request("PATCH", url, **kw)

    def delete(self, url: str, **kw: Any) -> httpx.Response:
        return self.request("DELETE", url, **kw)

    def close(self) -> None:
        self._portal.call(self._client.aclose)


ApiFactory = Callable[[str | None], AsgiClient]


@pytest.fixture
def api(pki: PkiFiles) -> Iterator[Callable[[Node], ApiFactory]]:
    """``api(node)(name)`` is a client presenting test certificate ``name`` (None: none)."""
    from keystrata.server import compose

    clients: list[AsgiClient] = []
    with start_blocking_portal() as portal:

        def for_node(node: Node) -> ApiFactory:
            app = compose(node.ctx)

            def as_(name: str | None) -> AsgiClient:
                pem = None if name is None else pki.pem(name)
                client = AsgiClient(portal, _WithClientCert(app, pem))
                clients.append(client)
                return client

            return as_

        yield for_node
        for c in clients:
            c.close()


def new_block_id() -> str:
    return str(uuid.uuid4())
