"""Reconciliation of two stations' ledgers, key ID by key ID, on hand-made entries
covering every outcome (the rules are ours: documented in the module): only the pairs
the two stations share, an as-of cut-off, keys in flight between two exports.
tests/e2e/test_reconcile_e2e.py runs it on real exports of a running network."""

from __future__ import annotations

import csv
import io
import json

import pytest

from keystrata_client.audit.reconcile import read_export, reconcile

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
    assert "no key served twice, one-sided, mismatched or unsettled" in table and PAIR in table
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


# ---------------------------------------------------------------- shared pairs, as-of


def at(minute: int, second: int = 0) -> str:
    return f"2026-12-01T10:{minute:02d}:{second:02d}.000000Z"


def registered(node: str, pair: str, stations: tuple[str, str]) -> dict[str, object]:
    return {
        "node": node, "event": "registry.created", "at": at(0), "kind": "pairs", "id": pair,
        "actor": "ops", "value": {"pair_id": pair, "stations": list(stations)},
    }  # fmt: skip


def alloc_at(key_ids: list[str], when: str, pair: str = PAIR) -> dict[str, object]:
    return {**allocated(key_ids), "at": when, "pair": pair}


def recv_at(key_ids: list[str], when: str) -> dict[str, object]:
    return {**received(key_ids), "at": when, "owner": A}


def deliv_at(key_ids: list[str], when: str) -> dict[str, object]:
    return {**delivered(key_ids), "at": when}


OTHER = "pair-karsvik-brenhaven"


def healthy() -> tuple[list[dict[str, object]], list[dict[str, object]]]:
    """Karsvik shares one pair with Tollmere and has another with Brenhaven; every key
    of the shared pair reached Tollmere and was delivered."""
    at_a = [
        registered(A, PAIR, (A, B)),
        registered(A, OTHER, (A, "brenhaven")),
        alloc_at(["k1"], at(1)),
        alloc_at(["b1", "b2"], at(1, 30), pair=OTHER),  # never seen at Tollmere, rightly
        alloc_at(["k2"], at(2)),
    ]
    at_b = [
        registered(B, PAIR, (A, B)),
        recv_at(["k1"], at(1, 1)),
        deliv_at(["k1"], at(1, 2)),
        recv_at(["k2"], at(2, 1)),
        deliv_at(["k2"], at(2, 2)),
    ]
    return at_a, at_b


def test_pairs_of_other_stations_are_not_compared() -> None:
    at_a, at_b = healthy()
    result = reconcile(at_a, at_b)
    assert result.ok, result.to_table()
    assert {k.key_id: k.status for k in result.keys} == {"k1": "delivered", "k2": "delivered"}
    assert result.not_compared == {OTHER: A}
    assert f"not compared: {OTHER} (a pair of {A} only)" in result.to_table()
    # The same pair named explicitly is compared, and its keys are one-sided indeed.
    forced = reconcile(at_a, at_b, pair=OTHER)
    assert {k.status for k in forced.keys} == {"in_flight"}  # Tollmere heard nothing of it


def test_keys_after_the_earlier_export_are_later_not_one_sided() -> None:
    at_a, at_b = healthy()
    # Karsvik's export ends at 10:02:30; Tollmere's at 10:04, after two more keys: one
    # allocated after Karsvik's export (so only Tollmere knows it) and one Karsvik
    # allocated before its export that Tollmere received after.
    at_a.append(alloc_at(["k3"], at(2, 20)))
    at_b += [recv_at(["k3"], at(2, 40)), recv_at(["k4"], at(3)), deliv_at(["k4"], at(3, 1))]
    result = reconcile(at_a, at_b, first_time=at(2, 30), second_time=at(4))
    status = {k.key_id: k.status for k in result.keys}
    assert status == {"k1": "delivered", "k2": "delivered", "k3": "waiting", "k4": "after_cutoff"}
    assert result.ok and result.as_of == at(2, 30)
    # Without the cut-off, k4 is a key Tollmere has and Karsvik never allocated.
    late = reconcile(at_a, at_b, as_of=at(5))
    assert {k.key_id: k.status for k in late.keys}["k4"] == "one_sided" and not late.ok
    # Allocated after the cut-off at the owner: not compared either.
    early = reconcile(at_a, at_b, as_of="2026-12-01T11:01:30+01:00")  # 10:01:30 UTC
    assert {k.key_id: k.status for k in early.keys}["k2"] == "after_cutoff"
    assert early.as_of == at(1, 30)
    with pytest.raises(ValueError, match="RFC 3339"):
        reconcile(at_a, at_b, as_of="yesterday")
    with pytest.raises(ValueError, match="offset"):
        reconcile(at_a, at_b, as_of="2026-12-01T10:00:00")


def test_keys_on_their_way_are_in_flight_but_a_lost_one_is_one_sided() -> None:
    at_a, at_b = healthy()
    # k5 and k6 allocated before both exports; Tollmere has recorded neither yet: the
    # outbox sends in order and nothing allocated after them has arrived.
    at_a += [alloc_at(["k5"], at(2, 10)), alloc_at(["k6"], at(2, 11))]
    result = reconcile(at_a, at_b, first_time=at(3), second_time=at(3))
    assert {k.key_id: k.status for k in result.keys}["k5"] == "in_flight"
    assert result.ok
    assert result.counts()[PAIR]["in_flight"] == 2
    # Tollmere received k6 but not k5, allocated before it: k5 was lost.
    at_b.append(recv_at(["k6"], at(2, 12)))
    lost = reconcile(at_a, at_b, first_time=at(3), second_time=at(3))
    statuses = {k.key_id: k.status for k in lost.keys}
    assert statuses["k5"] == "one_sided" and statuses["k6"] == "waiting"
    assert not lost.ok and "later keys were" in lost.flagged[0].reason


def test_an_expiry_on_its_way_back_is_in_flight() -> None:
    at_a, at_b = healthy()
    at_a.append(alloc_at(["k7", "k8"], at(1, 40)))
    at_b += [recv_at(["k7", "k8"], at(1, 41)), {**expired(B, ["k7"]), "at": at(2, 50)}]
    result = reconcile(at_a, at_b, first_time=at(3), second_time=at(3))
    assert {k.key_id: k.status for k in result.keys}["k7"] == "in_flight" and result.ok
    # Karsvik heard of a later expiry (k8) but not of k7's: unsettled.
    at_b.append({**expired(B, ["k8"]), "at": at(2, 55)})
    at_a.append({**expired(A, ["k8"]), "at": at(2, 56)})
    unsettled = reconcile(at_a, at_b, first_time=at(3), second_time=at(3))
    statuses = {k.key_id: k.status for k in unsettled.keys}
    assert statuses == {**statuses, "k7": "unsettled", "k8": "expired"} and not unsettled.ok


def test_the_export_time_is_its_checkpoints_signing_time(tmp_path) -> None:
    folder = tmp_path / "export"
    folder.mkdir()
    lines = [
        json.dumps({"index": i, "entry_b64": "", "entry": e}) for i, e in enumerate(healthy()[0])
    ]
    (folder / "entries.jsonl").write_text("\n".join(lines) + "\n")
    signed = f"{A}\n5\nAAAA\nkeystrata/v2 signed-at {at(9)}\n"  # _checkpoint.py's format
    (folder / "checkpoint.json").write_text(json.dumps({"signed_text": signed}))
    read = [0]
    export = read_export(folder, progress=lambda n: read.__setitem__(0, read[0] + n))
    assert export.time == at(9) and len(export.entries) == 5
    assert read[0] == (folder / "entries.jsonl").stat().st_size
    (folder / "checkpoint.json").write_text(json.dumps({"signed_text": f"{A}\n5\nAAAA\n"}))
    assert read_export(folder).time == at(2)  # version 1: the last entry's time
