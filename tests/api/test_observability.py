"""Health, readiness and Prometheus metrics through the API, on SQLite and PostgreSQL.

Metrics are parsed with the Prometheus project's own Python parsers
(``prometheus_client.parser`` for the text format 0.0.4, ``prometheus_client.openmetrics
.parser`` for OpenMetrics 1.0) and compared with what the database holds."""

from __future__ import annotations

import base64
import dataclasses
import os
import threading
import time
import uuid
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from prometheus_client.openmetrics.parser import (
    text_string_to_metric_families as openmetrics_families,
)
from sqlalchemy import func, select, update

import relaynet
from conftest import _pg_admin
from helpers import break_ledger, snapshot
from keystrata import __version__
from keystrata.api.identity import NO_CERTIFICATE
from keystrata.crypto.hazmat import Keyring
from keystrata.delivery import slave_copy
from keystrata.ledger import checkpoints
from keystrata.loopback.pki import cert_pin
from keystrata.node.lifecycle import KEK_CHECK_PLAINTEXT
from keystrata.registry import provisioning
from keystrata.registry.specs import Kind, PrincipalSpec
from keystrata.storage.models import (
    KeyAlloc,
    LedgerEntry,
    LedgerHead,
    LinkBlock,
    NodeMeta,
    OutboxMessage,
    RelayOp,
)
from keystrata.storage.sealed import meta_context
from scrapes import LIVE, METRICS, READY, scrape

#: Every family a node exposes and its type; counters carry the "_total" suffix on
#: their samples (Prometheus naming conventions, common practice).
TYPES = {
    "keystrata_build_info": "gauge",
    "keystrata_link_key_available_bits": "gauge",
    "keystrata_link_key_received_bits": "counter",
    "keystrata_link_key_used_bits": "counter",
    "keystrata_link_planned_rate_bps": "gauge",
    "keystrata_link_plan_ratio": "gauge",
    "keystrata_outbox_pending_messages": "gauge",
    "keystrata_outbox_oldest_pending_age_seconds": "gauge",
    "keystrata_outbox_head_refusals": "gauge",
    "keystrata_ledger_entries": "counter",
    "keystrata_ledger_checkpointed_entries": "gauge",
    "keystrata_ledger_last_checkpoint_age_seconds": "gauge",
    "keystrata_http_request_duration_seconds": "histogram",
}
STATION_TYPES = {
    "keystrata_pair_ready_bits": "gauge",
    "keystrata_pair_owned_ready_bits": "gauge",
    "keystrata_pair_pending_bits": "gauge",
    "keystrata_delivered_keys": "counter",
    "keystrata_delivered_key_bits": "counter",
    "keystrata_expired_keys": "counter",
    "keystrata_expired_key_bits": "counter",
    "keystrata_waiting_keys": "gauge",
    "keystrata_refused_key_requests": "counter",
}
RELAY_TYPES = {
    "keystrata_relay_segments_made": "counter",
    "keystrata_relay_made_bits": "counter",
    "keystrata_relay_segments_settled": "counter",
    "keystrata_relay_in_flight_bits": "gauge",
    "keystrata_pair_reported_ready_bits": "gauge",
    "keystrata_pair_target_bits": "gauge",
}


# ---------------------------------------------------------------- helpers


def _json_block(key: bytes) -> dict[str, object]:
    return {
        "block_id": str(uuid.uuid4()),
        "key": base64.b64encode(key).decode(),  # RFC 4648 section 4
        "qber": 0.02,
        "epsilon": 1e-10,
        "produced_at": datetime.now(UTC).isoformat(),
    }


def _add_operator(node: Any) -> None:
    provisioning.create(
        node.ctx,
        Kind.PRINCIPALS,
        PrincipalSpec.model_validate(
            {
                "principal_id": "ops-ada",
                "role": "operator",
                "cert_subject": "ops-ada",
                "cert_sha256": cert_pin(node.ctx.settings.tls.cert.parent, "ops-ada"),
            }
        ),
        actor="test",
    )


@dataclasses.dataclass(frozen=True)
class _At:
    moment: datetime

    def now(self) -> datetime:
        return self.moment


# ---------------------------------------------------------------- metrics


def test_pool_and_ledger_metrics_match_the_database(station, api) -> None:
    node = api(station)
    ops = node("ops-ada")
    blocks = [_json_block(os.urandom(1024)) for _ in range(3)]
    r = node("mod-link-a").post("/api/v1/links/link-a/blocks", json={"blocks": blocks})
    assert r.status_code == 200, r.text
    m = scrape(ops)
    for name, kind in (TYPES | STATION_TYPES).items():
        if name != "keystrata_ledger_last_checkpoint_age_seconds":  # none signed yet
            assert m.families[name].type == kind, name
    assert not set(m.families) & set(RELAY_TYPES)
    assert m.samples("keystrata_build_info") == {
        frozenset({"version": __version__, "node_id": "station-a", "role": "station"}.items()): 1
    }
    # Only links ending at this node: link-a (link-b joins the relay and station-b).
    assert m.value("keystrata_link_key_available_bits", link="link-a") == 3 * 1024 * 8
    assert m.value("keystrata_link_key_received_bits_total", link="link-a") == 3 * 1024 * 8
    assert m.value("keystrata_link_key_used_bits_total", link="link-a") == 0
    assert len(m.samples("keystrata_link_key_available_bits")) == 1
    with station.ctx.db.read() as s:
        stored = s.execute(select(func.sum(LinkBlock.length - LinkBlock.used))).scalar_one()
        entries = s.execute(select(func.count()).select_from(LedgerEntry)).scalar_one()
    assert m.value("keystrata_link_key_available_bits", link="link-a") == 8 * stored
    assert m.value("keystrata_ledger_entries_total") == entries  # scrapes write nothing
    assert m.value("keystrata_pair_ready_bits", pair="pair-ac") == 0
    assert m.value("keystrata_ledger_checkpointed_entries") == 0
    assert not m.samples("keystrata_ledger_last_checkpoint_age_seconds")
    signed = checkpoints.sign_now(station.ctx, force=True)
    assert signed is not None
    before = datetime.now(UTC)
    m = scrape(ops)
    age = m.value("keystrata_ledger_last_checkpoint_age_seconds")
    assert 0 <= age <= (datetime.now(UTC) - signed.signed_at).total_seconds()
    assert age >= (before - signed.signed_at).total_seconds() - 1e-3
    assert m.value("keystrata_ledger_checkpointed_entries") == signed.tree_size == entries


def test_openmetrics_when_the_scraper_asks_for_it(station, api) -> None:
    r = api(station)("ops-ada").get(
        METRICS, headers={"accept": "application/openmetrics-text; version=1.0.0"}
    )
    assert r.status_code == 200
    assert r.headers["content-type"].startswith("application/openmetrics-text")
    assert r.text.endswith("# EOF\n")  # OpenMetrics 1.0: the exposition ends with EOF
    names = {f.name for f in openmetrics_families(r.text)}
    assert {"keystrata_ledger_entries", "keystrata_link_key_available_bits"} <= names


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    net = relaynet.build(make_node, db_factory)
    relaynet.provision_saes(net)
    _add_operator(net.relay)
    relaynet.ready_key(net)
    return net


def _ready_bits(net: relaynet.RelayNet, station: str, *, owned: bool = False) -> int:
    return 8 * sum(
        s.length - s.used
        for s in net.segments(station).values()
        if s.state == "ready" and (s.owner == station or not owned)
    )


def test_relay_and_delivery_metrics_match_the_database(net, api) -> None:
    a1, b1 = api(net.a)("sae-a1"), api(net.b)("sae-b1")
    r = a1.post("/api/v1/keys/sae-b1/enc_keys", json={"number": 3, "size": 256})
    assert r.status_code == 200, r.text
    delivered = r.json()["keys"]
    net.drain()
    ids = {"key_IDs": [{"key_ID": k["key_ID"]} for k in delivered]}
    r = b1.post("/api/v1/keys/sae-a1/dec_keys", json=ids)
    assert r.status_code == 200, r.text
    delivered += r.json()["keys"]
    assert b1.post("/api/v1/keys/sae-a1/dec_keys", json=ids).status_code == 401  # refused
    # Two more keys that no slave collects: they expire at B, and B tells A.
    r = a1.post("/api/v1/keys/sae-b1/enc_keys", json={"number": 2, "size": 512})
    assert r.status_code == 200
    delivered += r.json()["keys"]
    net.drain()
    later = dataclasses.replace(net.b.ctx, clock=_At(datetime.now(UTC) + timedelta(days=1)))
    assert slave_copy.expire(later) == 2
    at_b = scrape(api(net.b)("ops-ada"))
    with net.b.ctx.db.read() as s:
        queued = s.execute(
            select(func.count()).where(OutboxMessage.destination == "station-a")
        ).scalar_one()
    assert queued == 1  # key.expired, for the owner
    assert at_b.value("keystrata_outbox_pending_messages", destination="station-a") == queued
    assert at_b.value("keystrata_outbox_oldest_pending_age_seconds", destination="station-a") < 60
    assert at_b.value("keystrata_outbox_head_refusals", destination="station-a") == 0
    net.drain()

    at_a, at_b = scrape(api(net.a)("ops-ada")), scrape(api(net.b)("ops-ada"))
    with net.a.ctx.db.read() as s:
        master_keys, master_bits = s.execute(
            select(func.count(), func.sum(KeyAlloc.size_bits)).where(KeyAlloc.owner == "station-a")
        ).one()
    assert (master_keys, master_bits) == (5, 3 * 256 + 2 * 512)
    assert at_a.value("keystrata_delivered_keys_total", pair="pair-ab", to="master") == 5
    assert at_a.value("keystrata_delivered_key_bits_total", pair="pair-ab", to="master") == (
        master_bits
    )
    assert at_a.value("keystrata_expired_keys_total", pair="pair-ab") == 2
    assert at_b.value("keystrata_delivered_keys_total", pair="pair-ab", to="slave") == 3
    assert at_b.value("keystrata_delivered_key_bits_total", pair="pair-ab", to="slave") == 768
    assert at_b.value("keystrata_expired_keys_total", pair="pair-ab") == 2
    assert at_b.value("keystrata_expired_key_bits_total", pair="pair-ab") == 1024
    assert at_b.value("keystrata_waiting_keys", pair="pair-ab") == 0
    assert at_b.samples("keystrata_refused_key_requests_total") == {
        frozenset({"sae": "sae-b1"}.items()): 1
    }
    assert not at_b.samples("keystrata_outbox_pending_messages")  # drained
    for station, m in (("station-a", at_a), ("station-b", at_b)):
        assert m.value("keystrata_pair_ready_bits", pair="pair-ab") == _ready_bits(net, station)
        assert m.value("keystrata_pair_owned_ready_bits", pair="pair-ab") == _ready_bits(
            net, station, owned=True
        )
        assert m.value("keystrata_pair_pending_bits", pair="pair-ab") == 0

    net.report_buffers()
    at_relay = scrape(api(net.relay)("ops-ada"))
    assert not set(at_relay.families) & set(STATION_TYPES)
    with net.relay.ctx.db.read() as s:
        ops = s.execute(select(RelayOp)).scalars().all()
    assert len(ops) == 6  # relaynet.ready_key makes six segments of 4096 bytes
    assert at_relay.value("keystrata_relay_segments_made_total", pair="pair-ab") == 6
    assert at_relay.value("keystrata_relay_made_bits_total", pair="pair-ab") == 6 * 4096 * 8
    ready = sum(op.state == "ready" for op in ops)
    assert ready == 6
    assert (
        at_relay.value("keystrata_relay_segments_settled_total", pair="pair-ab", outcome="ready")
        == ready
    )
    assert at_relay.value("keystrata_relay_in_flight_bits", pair="pair-ab") == 0
    for station in ("station-a", "station-b"):
        assert at_relay.value(
            "keystrata_pair_reported_ready_bits", pair="pair-ab", station=station
        ) == _ready_bits(net, station)
        link = relaynet.LINKS[station]
        with net.relay.ctx.db.read() as s:
            left = s.execute(
                select(func.sum(LinkBlock.length - LinkBlock.used)).where(LinkBlock.link_id == link)
            ).scalar_one()
        assert at_relay.value("keystrata_link_key_available_bits", link=link) == 8 * left

    # Canary (design invariant 6): no delivered key, in Base64 or hex, and no key ID
    # appears anywhere in any node's metrics.
    assert len(delivered) == 3 + 3 + 2
    for key in delivered:
        raw = base64.b64decode(key["key"], validate=True)
        for m in (at_a, at_b, at_relay):
            for needle in (key["key"], raw.hex(), raw.hex().upper(), key["key_ID"]):
                assert needle not in m.text


def test_latency_histogram_counts_requests_by_route_template(station, api) -> None:
    node = api(station)  # one app: the histogram lives in its process memory
    ops, nobody = node("ops-ada"), node(None)
    for _ in range(2):
        assert ops.get("/api/v1/links/link-a/pool").status_code == 200
    assert ops.get("/api/v1/links/no-such-link/pool").status_code == 404
    assert ops.get("/api/v1/registry/nodes/station-b").status_code == 200
    assert ops.get("/api/v1/nothing/here").status_code == 404
    assert nobody.get("/api/v1/links/link-a/pool").status_code == 401
    assert ops.request("BREW", "/api/v1/node").status_code == 405
    scrape(ops)  # counted once it has answered
    m = scrape(ops)
    count = m.samples("keystrata_http_request_duration_seconds_count")

    def n(method: str, route: str, status: int) -> float:
        return count.get(
            frozenset({"method": method, "route": route, "status": str(status)}.items()), 0
        )

    assert n("GET", "/api/v1/links/{link_id}/pool", 200) == 2
    assert n("GET", "/api/v1/links/{link_id}/pool", 404) == 1
    assert n("GET", "/api/v1/links/{link_id}/pool", 401) == 1
    assert n("GET", "/api/v1/registry/nodes/{entry_id}", 200) == 1
    assert n("GET", "unmatched", 404) == 1
    assert n("other", "/api/v1/node", 405) == 1
    assert n("GET", "/api/v1/metrics", 200) == 1
    assert sum(count.values()) == 8
    labels = {v for key in count for _, v in key}
    assert not any(raw in v for v in labels for raw in ("link-a", "no-such", "nothing", "BREW"))
    # Histogram rules (Prometheus exposition formats): cumulative buckets, le="+Inf"
    # equals _count, _sum is positive.
    buckets = m.samples("keystrata_http_request_duration_seconds_bucket")
    for key, total in count.items():
        series = sorted(
            (float(dict(k)["le"]), v)
            for k, v in buckets.items()
            if k - {("le", dict(k)["le"])} == key
        )
        values = [v for _, v in series]
        assert values == sorted(values) and series[-1] == (float("inf"), total)
        assert m.samples("keystrata_http_request_duration_seconds_sum")[key] > 0
    assert "_created" not in m.text  # no per-process start times (see observability/http.py)


# ---------------------------------------------------------------- health


def test_live_and_ready_answer_and_change_nothing(station, api) -> None:
    ops = api(station)("ops-ada")
    before = snapshot(station.ctx)
    r = ops.get(LIVE)
    assert (r.status_code, r.json()) == (200, {"status": "live"})
    r = ops.get(READY)
    assert r.status_code == 200, r.text
    checks = r.json()["checks"]
    assert r.json()["status"] == "ready"
    assert {
        k: checks.pop(k) for k in ("database", "kek", "ledger", "pairs", "links", "registry")
    } == dict.fromkeys(("database", "kek", "ledger", "pairs", "links", "registry"), "ok")
    # Test nodes run SQLite with synchronous=NORMAL and the override (conftest).
    durable = "ok" if station.ctx.db.backend == "postgresql" else "overridden: "
    assert checks == {"durability": checks["durability"]}
    assert checks["durability"].startswith(durable)
    assert snapshot(station.ctx) == before  # the ledger probe was rolled back


def _failing(r: Any) -> dict[str, str]:
    assert r.status_code == 503, r.text
    body = r.json()
    assert set(body) == {"message", "details"}  # the project's error object
    return {d["check"]: d["problem"] for d in body["details"]}


def test_not_ready_when_the_ledger_cannot_be_written(station, api) -> None:
    ops = api(station)("ops-ada")
    break_ledger(station)
    before = snapshot(station.ctx)
    r = ops.get(READY)
    failing = _failing(r)
    assert list(failing) == ["ledger"]
    assert "ledger" in r.json()["message"]
    assert "read-only" not in r.text  # our words, not the database's
    assert snapshot(station.ctx) == before
    assert ops.get(LIVE).status_code == 200  # alive, just not ready


def test_not_ready_when_the_kek_does_not_open_the_check_value(station, api) -> None:
    other = Keyring(os.urandom(32))
    with station.ctx.db.write() as s:
        s.execute(
            update(NodeMeta)
            .where(NodeMeta.name == "kek_check")
            .values(value=other.seal(KEK_CHECK_PLAINTEXT, meta_context("kek_check")))
        )
    assert list(_failing(api(station)("ops-ada").get(READY))) == ["kek"]


def test_ledger_check_waits_a_bounded_time_for_the_lock(station, api) -> None:
    db = station.ctx.db
    ops = api(station)("ops-ada")
    if db.backend == "sqlite":
        with db.engine.connect() as conn:
            usual = conn.exec_driver_sql("PRAGMA busy_timeout").scalar()
    held, release = threading.Event(), threading.Event()

    def writer() -> None:  # another worker's long transaction on the ledger head
        with db.write() as s:
            s.execute(update(LedgerHead).where(LedgerHead.id == 1).values(size=LedgerHead.size))
            held.set()
            release.wait(30)

    t = threading.Thread(target=writer)
    t.start()
    try:
        assert held.wait(10)
        start = time.monotonic()
        r = ops.get(READY)
        elapsed = time.monotonic() - start
    finally:
        release.set()
        t.join(30)
    assert list(_failing(r)) == ["ledger"]
    assert 1.5 <= elapsed < 10, elapsed  # the check's lock wait is 2 s, not 30 s
    assert ops.get(READY).status_code == 200
    if db.backend == "sqlite":
        # The short timeout never stays on a pooled connection.
        conns = [db.engine.connect() for _ in range(db.engine.pool.checkedin() + 1)]
        try:
            for conn in conns:
                assert conn.exec_driver_sql("PRAGMA busy_timeout").scalar() == usual
        finally:
            for conn in conns:
                conn.close()


def _remove_database(node: Any) -> None:
    db = node.ctx.db
    url = db.engine.url
    db.engine.dispose()
    if db.backend == "sqlite":
        path = Path(str(url.database))
        for suffix in ("", "-wal", "-shm"):
            Path(f"{path}{suffix}").unlink(missing_ok=True)
        path.mkdir()  # nothing can open it as a database file again
    else:
        with _pg_admin() as admin:
            admin.execute(f'DROP DATABASE "{url.database}" WITH (FORCE)')


def test_not_ready_when_the_database_is_gone(station, api) -> None:
    ops = api(station)("ops-ada")
    assert ops.get(READY).status_code == 200
    _remove_database(station)
    for path in (READY, LIVE, METRICS):
        assert _failing(ops.get(path)) == {"database": "unreachable"}, path


# ---------------------------------------------------------------- who may ask


def test_who_may_ask(station, api) -> None:
    node = api(station)
    expected = {
        "ops-ada": {LIVE: 200, READY: 200, METRICS: 200},
        "aud-ben": {LIVE: 200, READY: 403, METRICS: 403},
        "mon-cal": {LIVE: 200, READY: 200, METRICS: 200},
        "sae-a1": {LIVE: 403, READY: 403, METRICS: 403},
        "mod-link-a": {LIVE: 403, READY: 403, METRICS: 403},
        "peer-relay": {LIVE: 403, READY: 403, METRICS: 403},
        "stranger": {LIVE: 401, READY: 401, METRICS: 401},  # our CA, no principal
        None: {LIVE: 401, READY: 401, METRICS: 401},
    }
    for who, answers in expected.items():
        client = node(who)
        for path, status in answers.items():
            r = client.get(path)
            assert r.status_code == status, (who, path, r.text)
            if status == 401:  # no certificate at all: the same 401, with the hint
                assert r.json() == {"message": "unauthorized" if who else NO_CERTIFICATE}
