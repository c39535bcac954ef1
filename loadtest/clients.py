"""Concurrent SAE clients: each takes keys at station A as a master (ETSI GS QKD 014 Get
key) and fetches them at station B as the named slave (Get key with key IDs), recording
latencies and the SHA-256 digest of every key (never the key itself)."""

from __future__ import annotations

import asyncio
import base64
import binascii
import hashlib
import math
import time
from collections import Counter
from dataclasses import dataclass, field
from typing import Any

import httpx

from keystrata_client import TlsIdentity

#: 503 answers that DEVELOPERS.md documents ("Key delivery"): for Get key, too little
#: ready key or the pair's daily quota spent; for Get key with key IDs, an allocation
#: that names segment bytes not ready at the slave's station yet (the relay's
#: confirmation is on its way). A client waits and asks again; they are counted and
#: reported, not errors.
DOCUMENTED_503 = {
    "bits asked for are ready": "not_enough_key",
    "quota": "quota_reached",
    "has not reached this station yet": "allocation_not_here_yet",
}
RETRY_SECONDS = 0.05


@dataclass
class Tally:
    """Everything the clients saw, shared by all of them (one event loop, no locks)."""

    master: dict[str, str] = field(default_factory=dict)  # key ID -> digest at A
    slave: dict[str, str] = field(default_factory=dict)  # key ID -> digest at B
    digests: Counter[str] = field(default_factory=Counter)
    enc_ms: list[float] = field(default_factory=list)
    dec_ms: list[float] = field(default_factory=list)
    documented_503: Counter[str] = field(default_factory=Counter)
    violations: list[str] = field(default_factory=list)
    errors: Counter[str] = field(default_factory=Counter)

    def violation(self, what: str) -> None:
        self.errors[what.split(":")[0]] += 1
        if len(self.violations) < 50:  # keep the summary readable; the count is complete
            self.violations.append(what)

    @property
    def delivered(self) -> int:
        return len(self.slave)


def percentiles(samples: list[float]) -> dict[str, float | int]:
    """Count, p50, p90, p99 and max of latencies in milliseconds (nearest-rank
    percentiles, common practice)."""
    if not samples:
        return {"count": 0}
    ordered = sorted(samples)

    def rank(p: float) -> float:
        return ordered[max(0, math.ceil(p / 100 * len(ordered)) - 1)]

    return {
        "count": len(ordered),
        "p50_ms": round(rank(50), 2),
        "p90_ms": round(rank(90), 2),
        "p99_ms": round(rank(99), 2),
        "max_ms": round(ordered[-1], 2),
    }


def _keys(answer: Any) -> dict[str, bytes]:
    """key_ID -> key bytes of a Key container; raises ValueError when malformed."""
    out = {}
    for entry in answer["keys"]:
        try:
            # RFC 4648 section 4 Base64, strictly decoded.
            out[str(entry["key_ID"])] = base64.b64decode(entry["key"], validate=True)
        except (binascii.Error, KeyError, TypeError) as exc:
            raise ValueError("malformed key container") from exc
    return out


def _digest(key: bytes) -> str:
    return hashlib.sha256(key).hexdigest()


@dataclass
class Worker:
    """One SAE client: a master at A paired with its slave at B."""

    master: str
    slave: str
    url_a: str
    url_b: str
    identity_a: TlsIdentity
    identity_b: TlsIdentity
    number: int
    size: int

    async def run(self, tally: Tally, stop: asyncio.Event, target: int) -> None:
        limits = httpx.Limits(max_connections=1, max_keepalive_connections=1)
        async with (
            httpx.AsyncClient(
                verify=self.identity_a.ssl_context(), timeout=30, limits=limits
            ) as at_a,
            httpx.AsyncClient(
                verify=self.identity_b.ssl_context(), timeout=30, limits=limits
            ) as at_b,
        ):
            while not stop.is_set():
                keys = await self._take(at_a, tally)
                if keys is None:
                    continue
                await self._fetch(at_b, tally, keys)
                if tally.delivered >= target:
                    stop.set()

    async def _take(self, client: httpx.AsyncClient, tally: Tally) -> dict[str, bytes] | None:
        url = f"{self.url_a}/api/v1/keys/{self.slave}/enc_keys"
        body = {"number": self.number, "size": self.size}
        started = time.perf_counter()
        try:
            r = await client.post(url, json=body)
        except httpx.HTTPError as exc:
            tally.violation(f"enc_keys transport: {type(exc).__name__}")
            await asyncio.sleep(RETRY_SECONDS)
            return None
        elapsed = 1000 * (time.perf_counter() - started)
        if r.status_code == 503:
            reason = _documented(r)
            if reason is None:
                tally.violation(f"enc_keys 503: {_message(r)}")
            else:
                tally.documented_503[reason] += 1
            await asyncio.sleep(RETRY_SECONDS)
            return None
        if r.status_code != 200:
            tally.violation(f"enc_keys {r.status_code}: {_message(r)}")
            return None
        tally.enc_ms.append(elapsed)
        try:
            keys = _keys(r.json())
        except ValueError:
            tally.violation("enc_keys answer: malformed key container")
            return None
        if len(keys) != self.number or any(len(k) * 8 != self.size for k in keys.values()):
            tally.violation("enc_keys answer: wrong number or size of keys")
        for key_id, key in keys.items():
            digest = _digest(key)
            if key_id in tally.master:
                tally.violation("shared key: a key ID was delivered to masters twice")
            tally.master[key_id] = digest
            tally.digests[digest] += 1
            if tally.digests[digest] > 1:
                tally.violation("shared key: the same key bytes under two key IDs")
        return keys

    async def _fetch(self, client: httpx.AsyncClient, tally: Tally, keys: dict[str, bytes]) -> None:
        url = f"{self.url_b}/api/v1/keys/{self.master}/dec_keys"
        body = {"key_IDs": [{"key_ID": k} for k in keys]}
        for _ in range(100):
            started = time.perf_counter()
            try:
                r = await client.post(url, json=body)
            except httpx.HTTPError as exc:
                # Not sent again: a lost answer may have spent the keys (one-time).
                tally.violation(f"dec_keys transport: {type(exc).__name__}")
                return
            elapsed = 1000 * (time.perf_counter() - started)
            if r.status_code == 503:
                reason = _documented(r)
                if reason is None:  # not documented: a violation, and asked again
                    tally.violation(f"dec_keys 503: {_message(r)}")
                else:
                    tally.documented_503[f"dec_keys {reason}"] += 1
                await asyncio.sleep(RETRY_SECONDS)
                continue
            break
        if r.status_code != 200:
            tally.violation(f"dec_keys {r.status_code}: {_message(r)}")
            return
        tally.dec_ms.append(elapsed)
        try:
            got = _keys(r.json())
        except ValueError:
            tally.violation("dec_keys answer: malformed key container")
            return
        if set(got) != set(keys):
            tally.violation("dec_keys answer: other key IDs than asked for")
        for key_id, key in got.items():
            if key_id in tally.slave:
                tally.violation("shared key: a key ID was delivered to slaves twice")
            tally.slave[key_id] = _digest(key)
            if tally.master.get(key_id) != tally.slave[key_id]:
                tally.violation("mismatch: the slave's key differs from the master's")


def _message(r: httpx.Response) -> str:
    try:
        message = r.json().get("message", "")
    except ValueError:
        message = "(not JSON)"
    return str(message)[:120]


def _documented(r: httpx.Response) -> str | None:
    message = _message(r)
    return next((name for phrase, name in DOCUMENTED_503.items() if phrase in message), None)


async def run_clients(
    workers: list[Worker], tally: Tally, target: int, max_seconds: float
) -> float:
    """Run every worker until ``target`` keys reached their slaves or ``max_seconds``
    passed (each finishes the delivery it has begun); return the seconds taken."""
    stop = asyncio.Event()
    started = time.perf_counter()
    tasks = [asyncio.create_task(w.run(tally, stop, target)) for w in workers]
    try:
        await asyncio.wait_for(stop.wait(), timeout=max_seconds)
    except TimeoutError:
        stop.set()
    await asyncio.gather(*tasks)
    return time.perf_counter() - started
