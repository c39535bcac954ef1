"""Key delivery end to end on real processes (`keystrata serve`, mutual TLS on loopback):

* Get key with key IDs at station B that arrives before B heard of the allocation: A's
  outbox is held back by a real setting (`[server] background_work = false`, which
  starts no outbox worker), so the only way B can serve the key is to pull the pending
  `key.allocated` message from A (`GET /api/v1/peer/allocations`).
* Only the named slave fetches, once; the master itself and a third SAE get 401.
* The `keystrata-encryptors` command rekeys several pairs against the real network with
  zero mismatches.

Status codes and paths are ETSI GS QKD 014 V1.1.1's (clause 5, from memory): 200 with
a Key container, 401 Unauthorized for a key the caller may not have.
"""

from __future__ import annotations

import json
import signal
import ssl
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from e2enet import quiet, stock_and_stop
from keystrata.loopback.network import NETWORK, feed_links, start_network
from keystrata.loopback.pki import PkiFiles
from keystrata.loopback.processes import NodeProcess, stop_all
from keystrata_client import ApiError, OperatorClient
from keystrata_client.keys import KeyClient

RELAY = "\n[relay]\nsegment_bytes = 4096\nmin_segment_bytes = 512\ncycle_seconds = 0.1\n"
HELD = "[server]\nbackground_work = false\n"
ENCRYPTORS = Path(sys.executable).parent / "keystrata-encryptors"


@pytest.fixture(scope="module")
def network(tmp_path_factory, pki) -> Iterator[dict[str, NodeProcess]]:
    """A relay and two stations (SQLite) with ready pair key owned by each station; then
    the relay makes no more segments, so every segment is ready at both stations."""
    base = tmp_path_factory.mktemp("delivery")
    nodes = start_network(
        base, pki, {n: f"sqlite:///{base}/{n}.db" for n in NETWORK}, extra=RELAY, saes=True
    )
    try:
        feed_links(nodes, pki, 40)
        stock_and_stop(nodes, pki, 64, until=quiet)
        yield nodes
    finally:
        stop_all(list(nodes.values()))


def _station_a(network: dict[str, NodeProcess], pki: PkiFiles, *, held: bool) -> NodeProcess:
    """Station A running with its outbox held (``held``) or working. A restart takes
    seconds, so A is restarted only when it is not in that state already: the tests that
    need it held run one after another on one held process."""
    a = network["station-a"]
    config = a.config.read_text()
    is_held = HELD in config
    assert is_held or "[server]\n" in config
    if is_held == held and a.proc is not None and a.proc.poll() is None:
        return a
    a.stop()
    if is_held != held:
        a.config.write_text(
            config.replace("[server]\n", HELD, 1) if held else config.replace(HELD, "[server]\n", 1)
        )
    return a.start(pki)


@pytest.fixture
def held_outbox(network, pki) -> NodeProcess:
    """Station A with `[server] background_work = false`: it answers every request but
    runs no outbox worker, so its `key.allocated` notices stay queued."""
    return _station_a(network, pki, held=True)


@pytest.fixture
def working_outbox(network, pki) -> dict[str, NodeProcess]:
    """The network with station A's outbox worker running (as configured at the start)."""
    _station_a(network, pki, held=False)
    return network


def _pending_at(owner: NodeProcess, pki: PkiFiles) -> set[str]:
    """Key IDs of `key.allocated` messages the owner still holds for station B, read
    with station B's own node certificate (the peer route B pulls from)."""
    ctx = ssl.create_default_context(cafile=str(pki.ca))
    ctx.load_cert_chain(str(pki.cert("station-b")), str(pki.key("station-b")))
    r = httpx.get(owner.url + "/api/v1/peer/allocations", verify=ctx, timeout=10)
    assert r.status_code == 200, r.text
    return {k["key_ID"] for m in r.json()["messages"] for k in m["keys"]}


def _refused(url: str, pki: PkiFiles, sae: str, master: str, key_ids: tuple[str, ...]) -> str:
    """Ask for the keys as ``sae``; return the 401 message (anything else fails)."""
    with KeyClient(url, pki.identity(sae)) as kme, pytest.raises(ApiError) as caught:
        kme.get_keys_with_ids(master, key_ids)
    assert caught.value.status == 401, (sae, caught.value)  # clause 5.4 (from memory)
    return caught.value.message


def test_dec_keys_before_the_notice_pulls_it_from_the_owner(network, held_outbox, pki) -> None:
    a, b = held_outbox, network["station-b"]
    with KeyClient(a.url, pki.identity("sae-a1")) as master:
        sent = master.get_keys("sae-b1", number=3, size=256)
    # The notice has not left A: it is still queued for B.
    assert set(sent.key_ids) <= _pending_at(a, pki)
    with KeyClient(b.url, pki.identity("sae-b1")) as slave:
        got = slave.get_keys_with_ids("sae-a1", sent.key_ids)
    assert {k.key_id: k.key for k in got} == {k.key_id: k.key for k in sent}
    # B served it by pulling: A's outbox still holds the notice.
    assert set(sent.key_ids) <= _pending_at(a, pki)
    # Once only (ETSI GS QKD 014 clause 5.4, 401; from memory).
    _refused(b.url, pki, "sae-b1", "sae-a1", sent.key_ids)
    _refused(b.url, pki, "sae-b1", "sae-a1", sent.key_ids[:1])
    # B's ledger: stored for the slave (pulled), then delivered to it.
    events = _ledger(b, pki)
    stored = [e for e in events if e["event"] == "key.allocated" and e.get("side") == "slave"]
    assert any(set(sent.key_ids) <= set(e["key_ids"]) for e in stored)
    delivered = [e for e in events if e["event"] == "key.delivered"]
    assert any(e["key_ids"] == list(sent.key_ids) and e["sae"] == "sae-b1" for e in delivered)


def test_only_the_named_slave_fetches_even_before_the_notice(network, held_outbox, pki) -> None:
    a, b = held_outbox, network["station-b"]
    with KeyClient(a.url, pki.identity("sae-a1")) as master:
        sent = master.get_keys("sae-b1", number=2, size=256)
    assert set(sent.key_ids) <= _pending_at(a, pki)
    messages = {
        # A third SAE at B: its call makes B pull the allocation, then refuses.
        _refused(b.url, pki, "sae-b2", "sae-a1", sent.key_ids),
        # The master itself, at B and at its own station.
        _refused(b.url, pki, "sae-a1", "sae-a1", sent.key_ids),
        _refused(a.url, pki, "sae-a1", "sae-a1", sent.key_ids),
        # The right slave naming the wrong master.
        _refused(b.url, pki, "sae-b1", "sae-a2", sent.key_ids),
    }
    assert messages == {"unauthorized"}  # one answer for every reason: no oracle
    # None of that consumed anything: the named slave still gets identical keys.
    with KeyClient(b.url, pki.identity("sae-b1")) as slave:
        got = slave.get_keys_with_ids("sae-a1", sent.key_ids)
    assert [k.digest() for k in got] == [k.digest() for k in sent]
    _refused(b.url, pki, "sae-b1", "sae-a1", sent.key_ids)


def test_owner_down_before_the_notice_is_503_then_served(network, held_outbox, pki) -> None:
    """Regression: B used to answer 401 (final, recorded as a refusal) when it could not
    ask the owner about a key ID it had not heard of; the slave then dropped a key that
    was allocated to it. B must answer 503 (try again) and serve it once A is back."""
    a, b = held_outbox, network["station-b"]
    with KeyClient(a.url, pki.identity("sae-a1")) as master:
        sent = master.get_keys("sae-b1", number=2, size=256)
    assert set(sent.key_ids) <= _pending_at(a, pki)
    a.stop(signal.SIGKILL)  # the notice is still in A's outbox, and A is gone
    with KeyClient(b.url, pki.identity("sae-b1"), attempts=1) as slave:
        with pytest.raises(ApiError) as caught:
            slave.get_keys_with_ids("sae-a1", sent.key_ids)
        # ETSI GS QKD 014 clause 5.4: 503 is an error on the server side (from memory).
        assert caught.value.status == 503, caught.value
        assert "try again" in caught.value.message
        a.start(pki)
        got = slave.get_keys_with_ids("sae-a1", sent.key_ids)
    assert [k.digest() for k in got] == [k.digest() for k in sent]
    refused = [e for e in _ledger(b, pki) if e["event"] == "key.refused"]
    assert not any(set(e.get("key_ids", [])) & set(sent.key_ids) for e in refused)


def _ledger(node: NodeProcess, pki: PkiFiles) -> list[dict[str, Any]]:
    """Every ledger entry of ``node`` through the auditor API."""
    with OperatorClient(node.url, pki.identity("ops-ada")) as ops:
        known = {p["principal_id"] for p in ops.list("principals")}
        if "aud-ben" not in known:
            ops.create(
                "principals",
                {"principal_id": "aud-ben", "role": "auditor", "cert_subject": "aud-ben"},
            )
    return audit_entries(node.url, pki)


def audit_entries(url: str, pki: PkiFiles) -> list[dict[str, Any]]:
    """Ledger entries (decoded) read page by page as auditor ``aud-ben``."""
    ctx = ssl.create_default_context(cafile=str(pki.ca))
    ctx.load_cert_chain(str(pki.cert("aud-ben")), str(pki.key("aud-ben")))
    out: list[dict[str, Any]] = []
    with httpx.Client(verify=ctx, timeout=30) as client:
        while True:
            r = client.get(url + f"/api/v1/audit/entries?start={len(out)}")
            assert r.status_code == 200, r.text
            page = r.json()["entries"]
            if not page:
                return out
            out += [e["entry"] for e in page]


def test_encryptor_command_rekeys_with_zero_mismatches(working_outbox, pki, tmp_path) -> None:
    network = working_outbox
    a, b = network["station-a"].url, network["station-b"].url

    def pair(name: str, master: str, m_url: str, slave: str, s_url: str) -> str:
        return f"""
[[pair]]
name = "{name}"
master_sae_id = "{master}"
master_url = "{m_url}"
master_cert = "{pki.cert(master)}"
master_key = "{pki.key(master)}"
slave_sae_id = "{slave}"
slave_url = "{s_url}"
slave_cert = "{pki.cert(slave)}"
slave_key = "{pki.key(slave)}"
"""

    config = tmp_path / "encryptors.toml"
    config.write_text(
        f"""
[emulator]
summary_seconds = 1.0
drain_seconds = 15.0
slave_patience_seconds = 15.0

[defaults]
ca = "{pki.ca}"
key_size_bits = 256
keys_per_rekey = 2
interval_seconds = 0.3
"""
        + pair("a1-b1", "sae-a1", a, "sae-b1", b)
        + pair("b2-a2", "sae-b2", b, "sae-a2", a)
    )
    run = subprocess.run(
        [str(ENCRYPTORS), "--config", str(config), "--rekeys", "4", "--duration", "60", "--json"],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert run.returncode == 0, run.stdout + run.stderr
    final = [json.loads(line) for line in run.stdout.splitlines() if '"final": true' in line]
    assert {s["name"] for s in final} == {"a1-b1", "b2-a2"}
    for stats in final:
        assert stats["mismatches"] == 0
        assert stats["keys_delivered"] == stats["matches"] == 8, stats  # 4 rekeys x 2 keys
        assert stats["bits_delivered"] == 8 * 256
        assert stats["errors"] == {} and stats["keys_lost"] == 0, stats
    # The table form, for people: one row per pair, counts only.
    shown = subprocess.run(
        [str(ENCRYPTORS), "--config", str(config), "--rekeys", "1", "--duration", "60"],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert shown.returncode == 0, shown.stdout + shown.stderr
    header, _rule, *rows = shown.stdout.strip().split("\n\n")[-1].splitlines()
    assert header.split()[:3] == ["encryptors", "rekeys", "keys"] and "mismatch" in header
    assert [r.split()[0] for r in rows] == ["a1-b1", "b2-a2"]
    assert all(r.split()[6] == "0" for r in rows)  # the mismatch column (bits: "512 bit")
