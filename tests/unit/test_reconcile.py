"""Reconciliation of two stations' ledgers, key ID by key ID, on hand-made entries
covering every outcome (the rules are ours: documented in the module)."""

from __future__ import annotations

import csv
import io
import json

import pytest

from keystrata_client.audit.reconcile import reconcile

A, B, PAIR = "karsvik", "tollmere", "pair-karsvik-tollmere"
AT = "2026-12-01T10:00:00.000000Z"


def allocated(key_ids: list[str], slaves: tuple[str, ...] = ("enc-t-1",)) -> dict[str, object]:
    return {
        "node": A,
        "event": "key.allocated",
        "at": AT,
        "pair": PAIR,
        "master": "enc-k-1",
        "slaves": list(slaves),
        "size_bits": 256,
        "key_ids": key_ids,
        "delivered_to": "enc-k-1",
    }


def received(key_ids: list[str], node: str = B) -> dict[str, object]:
    return {"node": node, "event": "key.allocated", "at": AT, "pair": PAIR, "key_ids": key_ids}


def delivered(key_ids: list[str], sae: str = "enc-t-1", master: str = "enc-k-1") -> dict:
    return {
        "node": B,
        "event": "key.delivered",
        "at": AT,
        "sae": sae,
        "master": master,
        "pair": PAIR,
        "key_ids": key_ids,
    }


def expired(node: str, key_ids: list[str]) -> dict[str, object]:
    return {"node": node, "event": "key.expired", "at": AT, "pair": PAIR, "key_ids": key_ids}


def test_every_outcome_is_named() -> None:
    at_a = [
        allocated(["k-ok", "k-exp", "k-wait", "k-lost", "k-half", "k-twice"]),
        allocated(["k-twice"]),
        allocated(["k-dup-slave"]),
        allocated(["k-stranger"]),
        expired(A, ["k-exp"]),
    ]
    at_b = [
        received(["k-ok", "k-exp", "k-wait", "k-half", "k-twice", "k-dup-slave", "k-stranger"]),
        delivered(["k-ok"]),
        expired(B, ["k-exp", "k-half"]),
        delivered(["k-dup-slave"]),
        delivered(["k-dup-slave"]),
        delivered(["k-stranger"], sae="enc-t-2"),
        received(["k-orphan"]),
        delivered(["k-orphan"]),
    ]
    result = reconcile(at_a, at_b)
    status = {k.key_id: k.status for k in result.keys}
    assert status == {
        "k-ok": "delivered",
        "k-exp": "expired",
        "k-wait": "waiting",
        "k-lost": "one_sided",
        "k-half": "unsettled",
        "k-twice": "served_twice",
        "k-dup-slave": "served_twice",
        "k-stranger": "mismatch",
        "k-orphan": "one_sided",
    }
    assert not result.ok
    counts = result.counts()[PAIR]
    assert counts["served_twice"] == 2 and counts["one_sided"] == 2 and counts["delivered"] == 1
    # The same answer whichever station is given first.
    again = reconcile(at_b, at_a)
    assert {k.key_id: k.status for k in again.keys} == status


def test_clean_ledgers_reconcile_and_render() -> None:
    at_a = [allocated(["k1", "k2"], slaves=("enc-t-1", "enc-t-2")), expired(A, ["k2"])]
    at_b = [
        received(["k1", "k2"]),
        delivered(["k1"]),
        delivered(["k1"], sae="enc-t-2"),
        delivered(["k2"]),
        expired(B, ["k2"]),  # enc-t-2 never fetched k2: expired at both
    ]
    result = reconcile(at_a, at_b)
    assert result.ok
    assert [k.status for k in result.keys] == ["delivered", "expired"]
    table = result.to_table()
    assert "no key served twice, none one-sided" in table and PAIR in table
    as_json = json.loads(json.dumps(result.to_json()))
    assert as_json["ok"] is True and as_json["pairs"][PAIR]["delivered"] == 1
    rows = list(csv.DictReader(io.StringIO(result.to_csv())))  # RFC 4180 via csv module
    assert [r["key_id"] for r in rows] == ["k1", "k2"]
    assert rows[0]["delivered_to"] == "enc-t-1;enc-t-2"


def test_the_two_ledgers_must_be_two_stations() -> None:
    with pytest.raises(ValueError, match="both ledgers"):
        reconcile([allocated(["k"])], [allocated(["k"])])
    with pytest.raises(ValueError, match="one node"):
        reconcile([allocated(["k"]), received(["k"])], [received(["k"], node="brenhaven")])
