"""Shared fixtures: a test PKI made at run time, real databases (SQLite and PostgreSQL),
initialised nodes, and API clients that present a given client certificate.

PostgreSQL: every test gets its own database cloned from a migrated template. Without a
server the PostgreSQL half of the suite is skipped locally; with ``CI`` set it fails.
"""

from __future__ import annotations

import itertools
import os
import shutil
import uuid
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import psycopg
import pytest
from anyio.from_thread import BlockingPortal, start_blocking_portal

from keystrata.config import Settings, load_settings
from keystrata.crypto.kek import write_new_kek
from keystrata.crypto.pki import PkiDir
from keystrata.services.context import NodeContext
from keystrata.services.node import initialise, load_keyring, open_node
from keystrata.storage import migrate
from keystrata.storage.db import Database, make_engine

PG_URL = os.environ.get(
    "KEYSTRATA_TEST_PG_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/postgres"
)
_counter = itertools.count()


# ---------------------------------------------------------------- PKI


@dataclass(frozen=True)
class PkiFiles:
    dir: Path
    foreign_dir: Path

    @property
    def ca(self) -> Path:
        return self.dir / "ca.crt"

    def cert(self, name: str) -> Path:
        return self.dir / f"{name}.crt"

    def key(self, name: str) -> Path:
        return self.dir / f"{name}.key"

    def pem(self, name: str) -> str:
        return self.cert(name).read_text()


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
    "peer-relay": "peer",
    "stranger": "operator",  # issued by our CA but never registered as a principal
}
NODES = ("relay-1", "station-a", "station-b", "station-c")


@pytest.fixture(scope="session")
def pki(tmp_path_factory: pytest.TempPathFactory) -> PkiFiles:
    base = tmp_path_factory.mktemp("pki")
    ours = PkiDir(base / "ca")
    ours.init("Test Network CA")
    for node in NODES:
        ours.issue_node(node, ["127.0.0.1", "localhost"])
    for name, role in CLIENTS.items():
        ours.issue_client(name, role)
    foreign = PkiDir(base / "foreign")
    foreign.init("Some Other CA")
    foreign.issue_client("ops-ada", "operator")  # same subject, wrong CA
    return PkiFiles(dir=ours.path, foreign_dir=foreign.path)


# ---------------------------------------------------------------- databases


def _pg_admin() -> psycopg.Connection[Any]:
    url = PG_URL.replace("postgresql+psycopg://", "postgresql://")
    return psycopg.connect(url, autocommit=True, connect_timeout=3)


def _pg_url(dbname: str) -> str:
    return PG_URL.rsplit("/", 1)[0] + "/" + dbname


@pytest.fixture(scope="session")
def pg_template() -> Iterator[str | None]:
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
    yield name
    with _pg_admin() as admin:
        admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


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
    made: list[str] = []
    if request.param == "postgresql":
        template = request.getfixturevalue("pg_template")
        if template is None:
            pytest.skip(f"no PostgreSQL at {PG_URL} (set CI=1 to make this a failure)")
    else:
        template_file = request.getfixturevalue("sqlite_template")

    def make() -> str:
        n = next(_counter)
        if request.param == "sqlite":
            path = tmp_path / f"node-{n}.db"
            shutil.copy(template_file, path)
            return f"sqlite:///{path}"
        name = f"ks_t_{os.getpid()}_{n}"
        with _pg_admin() as admin:
            admin.execute(f'CREATE DATABASE "{name}" TEMPLATE "{template}"')
        made.append(name)
        return _pg_url(name)

    yield make
    if made:
        with _pg_admin() as admin:
            for name in made:
                admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@pytest.fixture
def pg_factory(request: pytest.FixtureRequest) -> Iterator[Callable[[], str]]:
    """Make fresh, migrated PostgreSQL databases (for tests that need PostgreSQL)."""
    template = request.getfixturevalue("pg_template")
    if template is None:
        pytest.skip(f"no PostgreSQL at {PG_URL} (set CI=1 to make this a failure)")
    made: list[str] = []

    def make() -> str:
        name = f"ks_t_{os.getpid()}_{next(_counter)}"
        with _pg_admin() as admin:
            admin.execute(f'CREATE DATABASE "{name}" TEMPLATE "{template}"')
        made.append(name)
        return _pg_url(name)

    yield make
    with _pg_admin() as admin:
        for name in made:
            admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@pytest.fixture
def db_url(db_factory: Callable[[], str]) -> str:
    """URL of a fresh, migrated database of each backend."""
    return db_factory()


# ---------------------------------------------------------------- nodes


def write_config(
    folder: Path,
    *,
    node_id: str,
    role: str,
    db_url: str,
    pki: PkiFiles,
    port: int = 8443,
    extra: str = "",
    server_extra: str = "",
) -> Path:
    """Write a node's TOML file (and a fresh KEK) into ``folder``; return the TOML path."""
    folder.mkdir(parents=True, exist_ok=True)
    kek = folder / f"{node_id}.kek"
    if not kek.exists():
        write_new_kek(kek)
    path = folder / f"{node_id}.toml"
    path.write_text(f"""
[node]
id = "{node_id}"
role = "{role}"

[server]
host = "127.0.0.1"
port = {port}
{server_extra}

[tls]
ca = "{pki.ca}"
cert = "{pki.cert(node_id)}"
key = "{pki.key(node_id)}"

[database]
url = "{db_url}"
sqlite_synchronous = "NORMAL"

[kek]
file = "{kek}"
{extra}
""")
    return path


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
    from keystrata.domain.registry import Kind, LinkSpec, NodeSpec, PrincipalSpec
    from keystrata.services import registry

    nodes = [
        ("relay-1", "relay"),
        ("station-a", "station"),
        ("station-b", "station"),
        ("station-c", "station"),
    ]
    for node_id, role in nodes:
        if node_id != ctx.node_id:
            registry.create(
                ctx,
                Kind.NODES,
                NodeSpec.model_validate(
                    {"node_id": node_id, "role": role, "url": f"https://127.0.0.1/{node_id}"}
                ),
                actor="test",
            )
    for link, station in (("link-a", "station-a"), ("link-b", "station-b")):
        registry.create(
            ctx,
            Kind.LINKS,
            LinkSpec(link_id=link, relay_id="relay-1", station_id=station),
            actor="test",
        )
    principals: list[dict[str, Any]] = [
        {"principal_id": "ops-ada", "role": "operator", "cert_subject": "ops-ada"},
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
            "cert_subject": "peer-relay",
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
        registry.create(ctx, Kind.PRINCIPALS, PrincipalSpec.model_validate(body), actor="test")
    # One pair, so that every route has something real to answer about.
    from keystrata.domain.registry import PairSpec

    registry.create(
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
    from keystrata.api.app import create_app

    clients: list[AsgiClient] = []
    with start_blocking_portal() as portal:

        def for_node(node: Node) -> ApiFactory:
            app = create_app(node.ctx)

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
