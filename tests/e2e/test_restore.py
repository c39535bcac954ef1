"""Power loss and restored backups, on real processes (`keystrata serve`, mutual TLS on
loopback): a station's database goes back in time while its partner's does not.

The attacker here is the past: station A's (the owner's) database is copied mid-run,
more keys flow, then A is stopped and its database replaced by the copy, as a restore
from backup or a power loss on unsafe durability settings would leave it. A then
remembers less key consumption than B saw. Without restore detection A hands the same
segment bytes out again under new key IDs. With it: A holds the pair (Get key and Get
key with key IDs answer 503, the alert and readiness show it), B records that its
partner is behind, and after an operator's release keys flow again and no digest ever
repeats, across every key ID of the run. Then the same with B (the slave's station)
restored.

Key digests are SHA-256 (FIPS 180-4) of the key bytes as the SAE clients received them;
the comparison is across key IDs, so one byte string under two key IDs fails.
"""

from __future__ import annotations

import hashlib
import shutil
import sqlite3
import ssl
import time
from collections.abc import Callable, Iterator
from contextlib import closing
from pathlib import Path
from typing import Any

import httpx
import psycopg
import pytest
from prometheus_client.parser import text_string_to_metric_families
from sqlalchemy.engine import make_url

from e2enet import stock_and_stop, wait_for
from keystrata.loopback.network import NETWORK, feed_links, start_network
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, stop_all
from keystrata_client import ApiError, OperatorClient
from keystrata_client.keys import KeyClient

SETTINGS = """
[relay]
segment_bytes = 2048
min_segment_bytes = 512
cycle_seconds = 0.1

[restore_check]
interval_seconds = 0.5
peer_timeout_seconds = 2.0
"""
HELD_MESSAGE = "an operator must resolve it"
#: A worker that could not ask its partner at start serves the pair nothing until it has.
NOT_COMPARED_MESSAGE = "has not yet compared its state"


class Keys:
    """Every key the SAEs received: key ID -> SHA-256 hex digest, and every digest seen."""

    def __init__(self) -> None:
        self.by_id: dict[str, str] = {}
        self.ids_of: dict[str, set[str]] = {}

    def add(self, key_id: str, digest: str) -> None:
        assert self.by_id.setdefault(key_id, digest) == digest, key_id  # the ends agree
        self.ids_of.setdefault(digest, set()).add(key_id)

    def assert_no_bytes_twice(self) -> None:
        twice = {d: ids for d, ids in self.ids_of.items() if len(ids) > 1}
        assert twice == {}, f"the same key bytes under {len(twice)} pairs of key IDs"


def _client(url: str, pki: PkiFiles, name: str) -> httpx.Client:
    ctx = ssl.create_default_context(cafile=str(pki.ca))
    ctx.load_cert_chain(str(pki.cert(name)), str(pki.key(name)))
    return httpx.Client(base_url=url, verify=ctx, timeout=15)


def _rekey(nodes: dict[str, NodeProcess], pki: PkiFiles, keys: Keys, n: int, way: str) -> None:
    """``n`` rekeys of two 256-bit keys: the master takes keys at its station, the slave
    fetches them by ID at the other; each key's digest is recorded from both ends."""
    master, m_at, slave, s_at = (
        ("sae-a1", "station-a", "sae-b1", "station-b")
        if way == "a->b"
        else ("sae-b2", "station-b", "sae-a2", "station-a")
    )
    with (
        KeyClient(nodes[m_at].url, pki.identity(master), attempts=1) as kme_m,
        KeyClient(nodes[s_at].url, pki.identity(slave), attempts=1) as kme_s,
    ):
        for _ in range(n):
            got = kme_m.get_keys(slave, 2, 256)
            for key in got:
                keys.add(key.key_id, key.digest())
            fetched = wait_for(
                "the slave's keys",
                lambda got=got: _try(lambda: kme_s.get_keys_with_ids(master, got.key_ids)),
                30,
            )
            for key in fetched:
                keys.add(key.key_id, key.digest())


def _try(call: Callable[[], Any]) -> Any:
    try:
        return call()
    except ApiError as exc:
        if exc.status == 503:
            return None
        raise


def _outbox_drained(nodes: dict[str, NodeProcess], pki: PkiFiles, sender: str) -> bool:
    """No key allocation of ``sender`` still on its way to its partner (asked with the
    partner's node certificate on the peer route the partner pulls from)."""
    partner = "station-b" if sender == "station-a" else "station-a"
    with _client(nodes[sender].url, pki, partner) as peer:
        return peer.get("/api/v1/peer/allocations").json()["messages"] == []


def _metric(url: str, pki: PkiFiles, name: str) -> dict[tuple[tuple[str, str], ...], float]:
    with _client(url, pki, "ops-ada") as mon:
        text = mon.get("/api/v1/metrics").text
    # prometheus_client's own parser is the reference for the text format.
    return {
        tuple(sorted(s.labels.items())): s.value
        for f in text_string_to_metric_families(text)
        for s in f.samples
        if s.name == name
    }


class Backend:
    """Copy and put back one station's database, SQLite file or PostgreSQL database."""

    def __init__(self, url: str, folder: Path) -> None:
        self.url, self.folder = url, folder
        self.is_sqlite = url.startswith("sqlite")

    def copy(self, node: NodeProcess, pki: PkiFiles) -> None:
        if self.is_sqlite:
            # The sqlite3 backup API copies a consistent snapshot of a live database.
            path = make_url(self.url).database
            # Closed explicitly: sqlite3's own context manager only commits, and a
            # connection left open would, when collected, checkpoint the live WAL into
            # the file after the restore put the copy there.
            with (
                closing(sqlite3.connect(path)) as src,
                closing(sqlite3.connect(self.folder / "copy.db")) as dst,
            ):
                src.backup(dst)
            return
        # CREATE DATABASE ... TEMPLATE needs no other connection: stop the node first.
        node.stop()
        self._pg(f'CREATE DATABASE "{self._name}_copy" TEMPLATE "{self._name}"')
        node.start(pki)

    def restore(self) -> None:
        if self.is_sqlite:
            path = Path(str(make_url(self.url).database))
            for suffix in ("-wal", "-shm"):
                Path(f"{path}{suffix}").unlink(missing_ok=True)
            shutil.copyfile(self.folder / "copy.db", path)
            return
        self._pg(f'DROP DATABASE "{self._name}" WITH (FORCE)')
        self._pg(f'ALTER DATABASE "{self._name}_copy" RENAME TO "{self._name}"')

    @property
    def _name(self) -> str:
        return str(make_url(self.url).database)

    def _pg(self, statement: str) -> None:
        u = make_url(self.url)
        with psycopg.connect(
            f"host={u.host} port={u.port or 5432} user={u.username} dbname=postgres",
            autocommit=True,
        ) as conn:
            conn.execute(statement)  # type: ignore[arg-type]


@pytest.fixture
def network(tmp_path, pki, db_factory) -> Iterator[tuple[dict[str, NodeProcess], dict[str, str]]]:
    """Relay and two stations with ready key owned by each; then the relay stops making
    segments, so consumption only moves by key delivery."""
    urls = {n: db_factory() for n in NETWORK}
    nodes = start_network(tmp_path, pki, urls, extra=SETTINGS, saes=True)
    try:
        feed_links(nodes, pki, 24)
        stock_and_stop(nodes, pki, 40)
        yield nodes, urls
    finally:
        stop_all(list(nodes.values()))


def _restore_scenario(
    nodes: dict[str, NodeProcess], urls: dict[str, str], pki: PkiFiles, tmp: Path, victim: str
) -> None:
    keys = Keys()
    other = "station-b" if victim == "station-a" else "station-a"
    _rekey(nodes, pki, keys, 4, "a->b")
    _rekey(nodes, pki, keys, 2, "b->a")
    backend = Backend(urls[victim], tmp)
    backend.copy(nodes[victim], pki)  # the backup, mid-run
    _rekey(nodes, pki, keys, 4, "a->b")
    _rekey(nodes, pki, keys, 2, "b->a")
    for station in ("station-a", "station-b"):
        wait_for("allocations delivered", lambda s=station: _outbox_drained(nodes, pki, s))
    nodes[victim].stop()
    backend.restore()
    nodes[victim].start(pki)

    # The attacker's move: ask the restored station for keys at once.
    for master, slave in (("sae-a1", "sae-b1"), ("sae-b2", "sae-a2")):
        at = "station-a" if master.startswith("sae-a") else "station-b"
        with KeyClient(nodes[at].url, pki.identity(master), attempts=1) as kme:
            try:
                for key in kme.get_keys(slave, 2, 256):
                    keys.add(key.key_id, key.digest())
            except ApiError as exc:
                assert exc.status == 503, exc
                if at == victim:
                    assert HELD_MESSAGE in exc.message or NOT_COMPARED_MESSAGE in exc.message
    keys.assert_no_bytes_twice()

    # Held at the victim: both ETSI calls 503 with the message; alert and readiness.
    master, slave = ("sae-a1", "sae-b1") if victim == "station-a" else ("sae-b2", "sae-a2")

    def held_answer() -> bool:
        with KeyClient(nodes[victim].url, pki.identity(master), attempts=1) as kme:
            try:
                kme.get_keys(slave, 1, 256)
            except ApiError as exc:
                assert exc.status == 503, exc
                return HELD_MESSAGE in exc.message
        raise AssertionError("the restored station handed out key")

    wait_for("the hold's answer", held_answer, 30)
    held = _metric(nodes[victim].url, pki, "keystrata_pair_held")
    assert any(dict(k)["behind"] == "self" and dict(k)["pair"] == "pair-ab" for k in held), held
    with _client(nodes[victim].url, pki, "ops-ada") as mon:
        ready = mon.get("/api/v1/health/ready")
    assert ready.status_code == 200 and ready.json()["checks"]["pairs"].startswith("held: ")
    # The partner learns it too (its periodic check), and keeps its own findings open.
    wait_for(
        "the partner's alert",
        lambda: any(
            dict(k)["behind"] == "partner"
            for k in _metric(nodes[other].url, pki, "keystrata_pair_held")
        ),
        30,
    )

    # An operator releases the hold; keys flow again and no bytes repeat.
    with _client(nodes[victim].url, pki, "ops-ada") as ops:
        r = ops.post("/api/v1/pairs/pair-ab/hold/release", json={"reason": "restored backup"})
    assert r.status_code == 200, r.text
    assert r.json()["segments_advanced"] > 0
    _rekey(nodes, pki, keys, 4, "a->b")
    _rekey(nodes, pki, keys, 2, "b->a")
    keys.assert_no_bytes_twice()
    assert len(keys.by_id) >= 2 * 3 * 6  # three rounds of six rekeys
    wait_for(
        "the partner's finding closed",
        lambda: not _metric(nodes[other].url, pki, "keystrata_pair_held"),
        30,
    )
    with OperatorClient(nodes[victim].url, pki.identity("ops-ada")) as op:
        pem = Path(pki.cert("aud-ben")).read_text()
        op.create(
            "principals",
            {
                "principal_id": "aud-ben",
                "role": "auditor",
                "cert_subject": "aud-ben",
                "cert_sha256": hashlib.sha256(ssl.PEM_cert_to_DER_cert(pem)).hexdigest(),
            },
        )
    with _client(nodes[victim].url, pki, "aud-ben") as aud:
        found = aud.get(
            "/api/v1/audit/search",
            params={"pair": "pair-ab", "event": ["pair.held", "pair.released"]},
        ).json()["entries"]
    events = [e["entry"]["event"] for e in found]
    assert events[:1] == ["pair.held"] and "pair.released" in events, events


@pytest.mark.parametrize(
    "db_factory", ["sqlite", pytest.param("postgresql", marks=pytest.mark.slow)], indirect=True
)
def test_restored_owner_is_held_and_serves_no_byte_twice(network, pki, tmp_path) -> None:
    nodes, urls = network
    _restore_scenario(nodes, urls, pki, tmp_path, "station-a")


@pytest.mark.slow
@pytest.mark.parametrize("db_factory", ["sqlite", "postgresql"], indirect=True)
def test_restored_slave_station_is_held_and_serves_no_key_twice(network, pki, tmp_path) -> None:
    nodes, urls = network
    _restore_scenario(nodes, urls, pki, tmp_path, "station-b")


@pytest.mark.parametrize(
    "db_factory", ["sqlite", pytest.param("postgresql", marks=pytest.mark.slow)], indirect=True
)
def test_a_slave_station_that_lost_only_deliveries_serves_no_key_twice(
    network, pki, tmp_path
) -> None:
    """Station B's backup holds keys still waiting for their slave; the slave then
    fetches them; B is restored. No consumption point moved after the backup, so only
    the count of served keys that station A saw shows the loss: B holds the pair and
    the slave cannot fetch those keys a second time."""
    nodes, urls = network
    master, slave = "sae-a1", "sae-b1"
    with KeyClient(nodes["station-a"].url, pki.identity(master), attempts=1) as kme:
        got = kme.get_keys(slave, 4, 256)
    wait_for("allocations delivered", lambda: _outbox_drained(nodes, pki, "station-a"))
    backend = Backend(urls["station-b"], tmp_path)
    backend.copy(nodes["station-b"], pki)  # the keys wait at B in the backup
    with KeyClient(nodes["station-b"].url, pki.identity(slave), attempts=1) as kme:
        fetched = wait_for(
            "the slave's keys", lambda: _try(lambda: kme.get_keys_with_ids(master, got.key_ids))
        )
    assert [k.digest() for k in fetched] == [k.digest() for k in got]
    time.sleep(2.0)  # A's restore check (every 0.5 s) sees B's count of served keys
    nodes["station-b"].stop()
    backend.restore()
    nodes["station-b"].start(pki)

    def held_answer() -> bool:
        with KeyClient(nodes["station-b"].url, pki.identity(slave), attempts=1) as kme:
            try:
                kme.get_keys_with_ids(master, got.key_ids)
            except ApiError as exc:
                assert exc.status == 503, exc  # held, or not compared yet: never the keys
                return HELD_MESSAGE in exc.message
        raise AssertionError("the restored station served the keys again")

    wait_for("the hold's answer", held_answer, 30)
    held = _metric(nodes["station-b"].url, pki, "keystrata_pair_held")
    assert any(dict(k)["reason"] == "deliveries_lost" for k in held), held
    # Released: the keys that were waiting are destroyed, never served again.
    with _client(nodes["station-b"].url, pki, "ops-ada") as ops:
        r = ops.post("/api/v1/pairs/pair-ab/hold/release", json={"reason": "restored backup"})
    assert r.status_code == 200, r.text
    assert r.json()["keys_destroyed"] >= 4
    with (
        KeyClient(nodes["station-b"].url, pki.identity(slave), attempts=1) as kme,
        pytest.raises(ApiError) as err,
    ):
        kme.get_keys_with_ids(master, got.key_ids)
    assert err.value.status == 401
