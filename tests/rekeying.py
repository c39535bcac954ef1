"""Encryptor pairs rekeying through faults, and the checks of what they saw: master Get
key at one station, slave Get key with key IDs at the other (``keystrata_client.keys``),
each outcome recorded (digests, never keys); afterwards both ends agree, no key reached a
slave twice, and each station's ledger (auditor API, RFC 9162 roots recomputed from the
entries against the signed checkpoints) accounts for every key the clients got."""

from __future__ import annotations

import base64
import ssl
import threading
import time
from collections import Counter
from dataclasses import dataclass, field
from typing import Any

import httpx
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

from e2enet import RELAY_SETTINGS
from helpers import mth
from keystrata.loopback.pki import PkiFiles
from keystrata_client import ApiError, KeystrataClientError, TransportError
from keystrata_client.keys import KeyClient, UncertainDeliveryError

TIMEOUT = 10.0  # the SAE clients' HTTP timeout, seconds
PATIENCE = 45.0  # how long a slave keeps asking for one set of key IDs
SETTINGS = RELAY_SETTINGS + "\n[ledger]\ncheckpoint_seconds = 1.0\n"
#: (master SAE, its station, slave SAE, its station): one pair each way.
PAIRS = (
    ("sae-a1", "station-a", "sae-b1", "station-b"),
    ("sae-b2", "station-b", "sae-a2", "station-a"),
)


@dataclass
class Seen:
    """What the encryptor clients saw (digests and outcomes, never keys)."""

    master: dict[str, tuple[str, str]] = field(default_factory=dict)  # key ID -> (sae, sha)
    slave: dict[str, tuple[str, str]] = field(default_factory=dict)
    outcomes: Counter[str] = field(default_factory=Counter)
    problems: list[str] = field(default_factory=list)
    #: key IDs a slave was refused after an attempt whose answer was lost.
    refused_after_lost_answer: set[str] = field(default_factory=set)
    longest_call: float = 0.0
    lock: threading.Lock = field(default_factory=threading.Lock)


#: What each call may answer while nodes die and restart. "unsent": no connection;
#: "lost-answer": the connection dropped after the request left. Never a timeout.
ALLOWED = {
    "enc_keys": {"200", "503", "unsent", "lost-answer"},
    "dec_keys": {"200", "401", "503", "unsent", "lost-answer"},  # 401: see _fetch
    "dec_keys-again": {"401", "503", "unsent", "lost-answer"},  # 200 would be a 2nd delivery
}


def call(seen: Seen, what: str, fn: Any) -> tuple[str, Any]:
    """Run one client call; return (outcome, result) with outcome "200", another HTTP
    status, "lost-answer", "unsent" or "timeout"; record anything not ALLOWED."""
    start = time.monotonic()
    try:
        result = fn()
        outcome = "200"
    except ApiError as exc:
        outcome, result = str(exc.status), None
    except UncertainDeliveryError as exc:
        outcome, result = "lost-answer", None
        if isinstance(exc.__cause__, httpx.TimeoutException):
            outcome = "timeout"
    except TransportError as exc:
        outcome, result = "unsent", None
        if isinstance(exc.__cause__, httpx.TimeoutException):
            outcome = "timeout"
    except KeystrataClientError:  # an answer that is not a valid Key container
        outcome, result = "invalid-answer", None
    took = time.monotonic() - start
    with seen.lock:
        seen.outcomes[f"{what}:{outcome}"] += 1
        seen.longest_call = max(seen.longest_call, took)
        if outcome not in ALLOWED[what]:
            seen.problems.append(f"{what} answered {outcome} after {took:.1f} s")
    return outcome, result


def rekeying(
    pki: PkiFiles, urls: dict[str, str], pair: tuple[str, ...], seen: Seen, stop: threading.Event
) -> None:
    try:
        rekey_until(pki, urls, pair, seen, stop)
    except Exception as exc:  # a dead worker thread must fail the test, not hide
        with seen.lock:
            seen.problems.append(f"encryptor pair {pair[0]} stopped: {exc!r}")


def rekey_until(
    pki: PkiFiles, urls: dict[str, str], pair: tuple[str, ...], seen: Seen, stop: threading.Event
) -> None:
    master_sae, master_at, slave_sae, slave_at = pair
    master = KeyClient(urls[master_at], pki.identity(master_sae), timeout=TIMEOUT, attempts=1)
    slave = KeyClient(urls[slave_at], pki.identity(slave_sae), timeout=TIMEOUT, attempts=1)
    with master, slave:
        while not stop.is_set():
            outcome, got = call(seen, "enc_keys", lambda: master.get_keys(slave_sae, 2, 256))
            if outcome != "200":
                time.sleep(0.2)
                continue
            with seen.lock:
                for key in got:
                    seen.master[key.key_id] = (master_sae, key.digest())
            fetch(seen, slave, master_sae, slave_sae, got.key_ids)
            time.sleep(0.05)


def fetch(
    seen: Seen, slave: KeyClient, master_sae: str, slave_sae: str, ids: tuple[str, ...]
) -> None:
    lost_answer = False
    deadline = time.monotonic() + PATIENCE
    while True:
        outcome, got = call(seen, "dec_keys", lambda: slave.get_keys_with_ids(master_sae, ids))
        if outcome == "200":
            break
        if outcome == "401":
            with seen.lock:
                if lost_answer:  # the lost answer may have carried the keys: check later
                    seen.refused_after_lost_answer.update(ids)
                else:
                    seen.problems.append(f"dec_keys 401 for keys never served: {ids}")
            return
        lost_answer = lost_answer or outcome == "lost-answer"
        if time.monotonic() > deadline:
            with seen.lock:
                seen.problems.append(f"slave never got {ids} ({outcome})")
            return
        time.sleep(0.2)
    with seen.lock:
        for key in got:
            if key.key_id in seen.slave:
                seen.problems.append(f"key {key.key_id} reached {slave_sae} twice")
            seen.slave[key.key_id] = (slave_sae, key.digest())
    # A key is served once: asking again must not give it again.
    call(seen, "dec_keys-again", lambda: slave.get_keys_with_ids(master_sae, ids))


def auditor(url: str, pki: PkiFiles) -> httpx.Client:
    ctx = ssl.create_default_context(cafile=str(pki.ca))
    ctx.load_cert_chain(str(pki.cert("aud-ben")), str(pki.key("aud-ben")))
    return httpx.Client(base_url=url, verify=ctx, timeout=30)


def audit_entries(client: httpx.Client) -> list[bytes]:
    out: list[bytes] = []
    while page := client.get(f"/api/v1/audit/entries?start={len(out)}").json()["entries"]:
        out += [base64.b64decode(e["entry_b64"], validate=True) for e in page]
    return out


def checked_ledger(url: str, pki: PkiFiles) -> list[dict[str, Any]]:
    """The node's ledger entries once its latest checkpoint covers all of them, after
    checking the checkpoints against a Merkle root recomputed from the entries."""
    import json

    with auditor(url, pki) as aud:
        deadline = time.monotonic() + 30
        while True:
            entries = audit_entries(aud)
            r = aud.get("/api/v1/audit/checkpoints/latest")
            if r.status_code == 200 and r.json()["tree_size"] == len(entries):
                break
            assert time.monotonic() < deadline, "no checkpoint covers the whole ledger"
            time.sleep(0.2)
        latest = r.json()
        history = aud.get("/api/v1/audit/checkpoints?limit=1000").json()["checkpoints"]
    key = Ed25519PublicKey.from_public_bytes(base64.b64decode(latest["public_key"]))
    # RFC 9162 section 2.1.1: the root of the first tree_size entries, for the latest
    # checkpoint and a spread of earlier ones (signed before, between and after kills).
    step = max(1, len(history) // 12)
    for cp in [latest, *history[::step]]:
        key.verify(base64.b64decode(cp["signature"]), cp["signed_text"].encode())  # RFC 8032
        root = mth(entries[: cp["tree_size"]])
        assert base64.b64decode(cp["root_hash"]) == root, (url, cp["tree_size"])
    return [json.loads(e) for e in entries]


def ends_agree(seen: Seen) -> None:
    assert seen.slave, "no key reached a slave"
    for key_id, (_, digest) in seen.slave.items():
        assert key_id in seen.master, key_id  # a slave only gets keys a master got
        assert seen.master[key_id][1] == digest, key_id  # byte-identical (SHA-256)
    # No two key IDs carry the same bytes: digests unique across IDs, not only per ID
    # (a station that lost commits would hand its bytes out again under a new key ID).
    for side in (seen.master, seen.slave):
        ids_of: dict[str, list[str]] = {}
        for key_id, (_, digest) in side.items():
            ids_of.setdefault(digest, []).append(key_id)
        assert [ids for ids in ids_of.values() if len(ids) > 1] == []


def ledgers_account_for_every_key(seen: Seen, ledgers: dict[str, list[dict[str, Any]]]) -> None:
    station_of = {sae: at for pair in PAIRS for sae, at in (pair[:2], pair[2:])}
    allocated: dict[str, set[str]] = {}  # station -> key IDs handed to a master there
    delivered: dict[str, Counter[tuple[str, str]]] = {}  # station -> (sae, key ID)
    for station in ("station-a", "station-b"):
        allocated[station], delivered[station] = set(), Counter()
        for e in ledgers[station]:
            if e["event"] == "key.allocated" and "delivered_to" in e:
                allocated[station] |= {f"{e['delivered_to']}/{k}" for k in e["key_ids"]}
            if e["event"] == "key.delivered":
                delivered[station].update((e["sae"], k) for k in e["key_ids"])
    for key_id, (sae, _) in seen.master.items():
        assert f"{sae}/{key_id}" in allocated[station_of[sae]], key_id
    for key_id, (sae, _) in seen.slave.items():
        assert delivered[station_of[sae]][(sae, key_id)] == 1, key_id
    # A key ID refused after an answer was lost had been served by that lost answer.
    slave_of = {m: s for m, _, s, _ in PAIRS}
    for key_id in seen.refused_after_lost_answer:
        sae = slave_of[seen.master[key_id][0]]
        assert delivered[station_of[sae]][(sae, key_id)] == 1, key_id
    # No key served twice to any SAE, whoever the test saw.
    for counts in delivered.values():
        assert max(counts.values(), default=1) == 1
