"""Durability guard: a node refuses to start on a database that can lose a committed
transaction on power loss, unless the operator overrides it, visibly.

Attack seen from the operator's side of a careless deployment: a station whose database
may roll back a Get key whose answer already left would hand the same bytes out again
under a new key ID after a power cut. Real SQLite files and real PostgreSQL databases.
"""

from __future__ import annotations

import logging
from collections.abc import Iterator
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families
from sqlalchemy import create_engine
from sqlalchemy.engine import make_url

from conftest import Node, NodeFactory, seed_registry
from keystrata.config import load_settings
from keystrata.errors import ConfigError
from keystrata.node.lifecycle import open_node
from keystrata.observability import readiness
from keystrata.storage.db import Database, durability_risks

OVERRIDE = "KEYSTRATA_DATABASE__ACCEPT_DATA_LOSS_ON_POWER_FAILURE"
SYNC = "KEYSTRATA_DATABASE__SQLITE_SYNCHRONOUS"


def _alter_database(url: str, statement: str) -> None:
    """Run ``ALTER DATABASE <this test's own clone> ...`` on PostgreSQL."""
    name = make_url(url).database
    engine = create_engine(
        make_url(url).set(drivername="postgresql+psycopg"), isolation_level="AUTOCOMMIT"
    )
    try:
        with engine.connect() as conn:
            conn.exec_driver_sql(f'ALTER DATABASE "{name}" {statement}')
    finally:
        engine.dispose()


@pytest.fixture
def unsafe(make_node: NodeFactory, db_url: str) -> Iterator[tuple[Node, Database]]:
    """A station and a second engine on its database with a setting that can lose
    commits on power loss: SQLite ``synchronous=NORMAL`` (sqlite.org: in WAL mode a
    power loss can roll back the last transactions), PostgreSQL ``synchronous_commit =
    off`` for this database (postgresql.org, "Asynchronous Commit": a crash can lose
    the most recent commits that were reported as committed)."""
    node = make_node("station-a", "station", db_url=db_url)
    if db_url.startswith("sqlite"):
        db = Database.from_url(db_url, sqlite_synchronous="NORMAL")
    else:
        _alter_database(db_url, "SET synchronous_commit = off")
        db = Database.from_url(db_url)
    yield node, db
    db.dispose()


def test_unsafe_setting_is_refused_without_override(unsafe: tuple[Node, Database]) -> None:
    node, db = unsafe
    settings = load_settings(node.config_path, env={OVERRIDE: "false"})
    with pytest.raises(ConfigError) as err:
        open_node(settings, db)
    message = err.value.message
    setting = "sqlite_synchronous" if db.backend == "sqlite" else "synchronous_commit"
    assert setting in message
    assert "accept_data_loss_on_power_failure" in message  # the override is named
    assert "FULL" in message if db.backend == "sqlite" else "RESET synchronous_commit" in message


def test_override_starts_loudly_and_readiness_shows_it(
    unsafe: tuple[Node, Database], caplog: pytest.LogCaptureFixture
) -> None:
    node, db = unsafe
    settings = load_settings(node.config_path, env={OVERRIDE: "true"})
    with caplog.at_level(logging.WARNING, logger="keystrata"):
        ctx = open_node(settings, db)
    warned = [r for r in caplog.records if r.levelno == logging.WARNING]
    assert any("accept_data_loss_on_power_failure" in r.getMessage() for r in warned)
    result = readiness.assess(ctx)
    # Ready stays true: the operator chose this; the check is marked, not failed.
    assert result.ready
    assert result.checks["durability"].startswith(readiness.OVERRIDDEN)
    from keystrata.observability import metrics

    families = {m.name: m for m in metrics.collect(ctx)}
    assert [s.value for s in families["keystrata_durability_override"].samples] == [1]


def test_durable_database_reports_no_risk(make_node: NodeFactory, db_url: str) -> None:
    node = make_node("station-a", "station", db_url=db_url)
    db = Database.from_url(db_url)  # SQLite FULL; PostgreSQL as the test server runs
    try:
        assert durability_risks(db.engine) == []
        settings = load_settings(node.config_path, env={OVERRIDE: "false", SYNC: "FULL"})
        ctx = open_node(settings, db)
        assert readiness.assess(ctx).checks["durability"] == readiness.OK
    finally:
        db.dispose()


def test_metrics_text_carries_the_gauge(unsafe: tuple[Node, Database], api) -> None:
    """The gauge through the metrics route, parsed by prometheus_client's own parser
    (the reference for the text format)."""
    node, db = unsafe
    settings = load_settings(node.config_path, env={OVERRIDE: "true"})
    served = Node(settings=settings, config_path=node.config_path, ctx=open_node(settings, db))
    seed_registry(served.ctx)  # provisions the monitor principal mon-cal
    text = api(served)("mon-cal").get("/api/v1/metrics")
    assert text.status_code == 200
    families = {f.name: f for f in text_string_to_metric_families(text.text)}
    assert families["keystrata_durability_override"].samples[0].value == 1


def test_serve_refuses_sqlite_normal(tmp_path: Path, make_node: NodeFactory) -> None:
    """The real command: `keystrata serve` exits with the message, before listening."""
    from keystrata.loopback.processes import run_cli

    url = f"sqlite:///{tmp_path}/a.db"
    node = make_node("station-a", "station", db_url=url)
    result = run_cli(
        "serve",
        "--config",
        str(node.config_path),
        check=False,
        env={OVERRIDE: "false"},
        timeout=30,
    )
    assert result.returncode != 0
    assert "sqlite_synchronous" in result.stdout + result.stderr
