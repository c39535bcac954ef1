"""Attacks by nodes on each other, written from the attacker's side. Station C is a
partner of station B in pair-bc only; it is hostile and knows the bytes of pair-bc.
Whoever holds the relay's certificate can send relay messages but does not hold the
link keys. Each test asserts that the attempt is refused,
nothing changed, no key left, and the attempt is recorded.

In-process network of real nodes on real SQLite and PostgreSQL databases
(``tests/relaynet.py``); messages are carried by the same dispatcher the peer routes call.
"""

from __future__ import annotations

import base64
import json
import uuid
from datetime import UTC, datetime, timedelta
from typing import Any

import pytest
from sqlalchemy import select

import relaynet
from helpers import ledger_events, link_bytes, snapshot
from keystrata.errors import KeystrataError
from keystrata.node import dispatch
from keystrata.peering import messages, outbox
from keystrata.relay import operation
from keystrata.storage.models import KeyAlloc, PairSegment


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    net = relaynet.build(make_node, db_factory)
    relaynet.provision_saes(net)
    relaynet.ready_key(net, segments=2)
    c = make_node("station-c", "station", db_url=db_factory())
    relaynet.add_third_station(net, c, priority=1)
    return net


def _segment_of_c(net: relaynet.RelayNet) -> str:
    """A ready pair-bc segment owned by station C, at both B and C."""
    net.feed("station-b", 2)
    net.feed("station-c", 2)
    made = operation.make_segment(net.relay.ctx, "pair-bc", 4096, owner="station-c")
    net.drain()
    assert net.segments("station-b")[made.segment_id].state == "ready"
    return made.segment_id


def _send(net: relaynet.RelayNet, sender: str, to: str, body: dict[str, Any]) -> int:
    """Deliver a hand-made message as ``sender``; the status the receiver answered."""
    try:
        dispatch.handle(net.nodes[to].ctx, sender, body)
    except KeystrataError as exc:
        return exc.status
    return 200


def _allocation(segment: str, *, master: str, slaves: list[str], ttl: timedelta) -> dict[str, Any]:
    now = datetime.now(UTC)
    return messages.KeyAllocated(
        pair_id="pair-bc",
        owner="station-c",
        keys=[
            messages.AllocatedKey(
                key_ID=str(uuid.uuid4()),
                master=master,
                slaves=slaves,
                ranges=[messages.SegmentRange(segment=segment, offset=0, length=32)],
                size_bits=256,
                allocated_at=now,
                expires_at=now + ttl,
            )
        ],
    ).to_body()


def _refusals(ctx: Any) -> int:
    return ledger_events(ctx).count("peer.message_refused")


@pytest.mark.parametrize(
    ("master", "slaves", "ttl"),
    [
        ("sae-a1", ["sae-b1"], timedelta(days=3650)),  # master of station A, ten years
        ("sae-a1", ["sae-b1"], timedelta(seconds=60)),  # master of station A
        ("sae-c9", ["sae-b1"], timedelta(days=3650)),  # lifetime beyond the pair's TTL
        ("sae-c9", ["sae-a2"], timedelta(seconds=60)),  # slave not of this station
    ],
    ids=["foreign-master-long", "foreign-master", "lifetime", "foreign-slave"],
)
def test_partner_cannot_mint_keys_for_saes_that_are_not_its_own(net, api, master, slaves, ttl):
    segment = _segment_of_c(net)
    body = _allocation(segment, master=master, slaves=slaves, ttl=ttl)
    before = snapshot(net.b.ctx)
    refusals = _refusals(net.b.ctx)

    assert _send(net, "station-c", "station-b", body) == 403

    after = snapshot(net.b.ctx)
    assert after["key_alloc"] == before["key_alloc"]
    assert after["pair_segment"] == before["pair_segment"]
    assert _refusals(net.b.ctx) == refusals + 1
    # The slave asks for the minted key as if from that master: the one 401.
    key_id = body["keys"][0]["key_ID"]
    r = api(net.b)(slaves[0] if slaves[0].startswith("sae-b") else "sae-b1").get(
        f"/api/v1/keys/{master}/dec_keys?key_ID={key_id}"
    )
    assert r.status_code == 401


def test_partner_allocating_from_a_segment_it_does_not_own_is_refused(net):
    segment = _segment_of_c(net)
    with net.b.ctx.db.write() as s:  # make the segment B's own, as the relay could have
        s.get(PairSegment, segment).owner = "station-b"
    body = _allocation(segment, master="sae-c9", slaves=["sae-b1"], ttl=timedelta(seconds=60))
    before = snapshot(net.b.ctx)["key_alloc"]
    assert _send(net, "station-c", "station-b", body) == 403
    assert snapshot(net.b.ctx)["key_alloc"] == before


def test_a_neighbour_cannot_discard_another_pairs_segment(net):
    ready = [sid for sid, r in net.segments("station-b").items() if r.pair_id == "pair-ab"]
    victim = ready[0]
    assert net.segments("station-b")[victim].state == "ready"
    before = snapshot(net.b.ctx)["pair_segment"]
    body = messages.SegmentDiscarded(
        segment_id=victim, pair_id="pair-bc", reason="check_mismatch", sender_side="notice"
    ).to_body()
    assert _send(net, "station-c", "station-b", body) in (403, 404)
    assert snapshot(net.b.ctx)["pair_segment"] == before
    assert _refusals(net.b.ctx) >= 1


def test_a_forged_tombstone_does_not_kill_a_later_segment(net, monkeypatch):
    guessed = uuid.uuid4()
    body = messages.SegmentDiscarded(
        segment_id=str(guessed), pair_id="pair-bc", reason="bad_tag", sender_side="notice"
    ).to_body()
    _send(net, "station-c", "station-b", body)
    # The relay later happens to make a pair-ab segment under that ID.
    net.feed("station-a", 2)
    net.feed("station-b", 2)
    with monkeypatch.context() as patch:
        patch.setattr(operation.uuid, "uuid4", lambda: guessed)
        operation.make_segment(net.relay.ctx, relaynet.PAIR, 4096)
    net.drain()
    assert net.segments("station-a")[str(guessed)].state == "ready"
    assert net.segments("station-b")[str(guessed)].state == "ready"


def _notice_and_cipher(net: relaynet.RelayNet) -> tuple[Any, Any]:
    pending = [m for _, m in net.pending() if m.kind in ("relay.notice", "relay.ciphertext")]
    notice = next(m for m in pending if m.kind == "relay.notice")
    cipher = next(m for m in pending if m.kind == "relay.ciphertext")
    return notice, cipher


def test_relay_certificate_holder_cannot_make_both_stations_owners(net):
    """The relay made B the owner; someone sending as the relay (its TLS certificate,
    not its link keys) tells A that A owns the segment. Both stations must never serve
    the same bytes as master key."""
    net.feed("station-a", 2)
    net.feed("station-b", 2)
    made = operation.make_segment(
        net.relay.ctx,
        relaynet.PAIR,
        4096,
        owner="station-b",
        cipher_station="station-b",
    )
    notice, _ = _notice_and_cipher(net)
    forged = dict(notice.body)
    header = json.loads(base64.b64decode(forged["header"]))
    header["owner"] = "station-a"
    forged["header"] = base64.b64encode(json.dumps(header).encode()).decode()
    _send(net, "relay-1", "station-a", forged)
    outbox.delivered(net.relay.ctx.db, [notice.id])
    net.drain()
    a = net.segments("station-a").get(made.segment_id)
    b = net.segments("station-b")[made.segment_id]
    both_own = (
        a is not None
        and a.state == "ready"
        and b.state == "ready"
        and a.owner == "station-a"
        and b.owner == "station-b"
    )
    assert not both_own
    assert not (a is not None and a.state == "ready" and a.owner == "station-a")


def test_settled_reason_from_a_station_is_bounded(net):
    with net.relay.ctx.db.read() as s:
        from keystrata.storage.models import RelayOp

        op = s.execute(select(RelayOp).where(RelayOp.state == "ready")).scalars().first()
    assert op is not None
    before = snapshot(net.relay.ctx)["ledger_entry"]
    body = {
        "kind": "segment.settled",
        "v": messages.VERSION,
        "segment_id": op.segment_id,
        "outcome": "discarded",
        "reason": "x" * 10_000,
    }
    assert _send(net, op.notice_station, "relay-1", body) == 400
    assert snapshot(net.relay.ctx)["ledger_entry"] == before


def test_unknown_kind_or_version_is_a_clear_400(net):
    for body in (
        {"kind": "segment.exploded", "v": 1},
        {"kind": "segment.check", "v": 99, "segment_id": str(uuid.uuid4())},
        {"kind": "segment.check"},
    ):
        with pytest.raises(KeystrataError) as exc:
            dispatch.handle(net.a.ctx, "station-b", body)
        assert exc.value.status == 400
        assert "kind" in exc.value.message or "v" in exc.value.message


def test_minted_key_is_never_served(net, api):
    """End to end: after the refused allocation, no SAE at B can fetch anything."""
    segment = _segment_of_c(net)
    body = _allocation(segment, master="sae-a1", slaves=["sae-b1"], ttl=timedelta(days=1))
    _send(net, "station-c", "station-b", body)
    with net.b.ctx.db.read() as s:
        assert s.execute(select(KeyAlloc).where(KeyAlloc.owner == "station-c")).first() is None


def test_a_relay_that_tells_the_stations_different_stories_makes_no_segment(net):
    """Even the holder of both link keys (a faulty relay) cannot make A and B serve
    different views of one segment: the notice to A names A as owner with a valid tagA,
    the ciphertext to B names B; the check values cover the owner, so confirmation fails
    and both sides discard."""
    from cryptography.hazmat.primitives.poly1305 import Poly1305

    net.feed("station-a", 2)
    net.feed("station-b", 2)
    made = operation.make_segment(
        net.relay.ctx, relaynet.PAIR, 4096, owner="station-b", cipher_station="station-b"
    )
    notice, _ = _notice_and_cipher(net)
    header = json.loads(base64.b64decode(notice.body["header"]))
    header["owner"] = "station-a"
    forged_header = messages.SegmentHeader.model_validate(header).encode()
    ma = link_bytes(net.a, header["notice_mac_ranges"])
    tag = Poly1305.generate_tag(ma, len(forged_header).to_bytes(4, "big") + forged_header)
    forged = messages.RelayNotice(segment_id=made.segment_id, header=forged_header, tag=tag)
    assert _send(net, "relay-1", "station-a", forged.to_body()) == 200
    assert net.segments("station-a")[made.segment_id].owner == "station-a"
    outbox.delivered(net.relay.ctx.db, [notice.id])
    net.drain()
    assert net.segments("station-a")[made.segment_id].state == "discarded"
    assert net.segments("station-b")[made.segment_id].state == "discarded"


def test_one_station_reporting_an_empty_buffer_does_not_drain_its_partners_link(
    make_node, db_factory
):
    """Station A lies that its buffer of the pair is empty. Both stations hold the same
    ready segments, so B's honest report shows the pair is above its target: the relay
    spends no link key on it."""

    from keystrata.relay.buffers import record_report, station_report
    from keystrata.relay.scheduler import schedule_once

    policy = {"buffer_min_bits": 0, "buffer_target_bits": 65_536, "buffer_max_bits": 10**6}
    net = relaynet.build(make_node, db_factory, policy=policy)
    relaynet.ready_key(net, segments=4)
    net.feed("station-a", 8)
    net.feed("station-b", 8)
    honest = station_report(net.b.ctx, relaynet.PAIR)
    assert honest.ready_bits > 65_536
    lie = station_report(net.a.ctx, relaynet.PAIR).model_copy(
        update={"ready_bits": 0, "owned_ready_bits": 0}
    )
    record_report(net.relay.ctx, lie)
    record_report(net.relay.ctx, honest)
    assert schedule_once(net.relay.ctx, None).made == []


def test_a_programming_error_in_a_handler_is_not_a_400(net, api, monkeypatch):
    """A bug surfaces as itself (the app's handler answers 500 and logs it,
    ``api/errors.py``), never as a "malformed message" the sender would give up on."""
    from keystrata.config import Role

    def broken(ctx, sender, msg):
        raise KeyError("a bug")

    def broken_in(ctx, session, sender, msg):
        raise KeyError("a bug")

    monkeypatch.setitem(dispatch.HANDLERS[Role.STATION], messages.RelayNotice, broken)
    # A batch applies runs of segment messages in one transaction, by these handlers.
    monkeypatch.setitem(dispatch.IN_SESSION[Role.STATION], messages.RelayNotice, broken_in)
    net.feed("station-a", 2)
    net.feed("station-b", 2)
    operation.make_segment(net.relay.ctx, relaynet.PAIR, 2048, cipher_station="station-b")
    notice, _ = _notice_and_cipher(net)
    with pytest.raises(KeyError):
        dispatch.handle(net.a.ctx, "relay-1", notice.body)
    # Through the route: the ASGI test transport re-raises what the app answered 500 to.
    with pytest.raises(KeyError):
        api(net.a)("relay-1").post("/api/v1/peer/messages/batch", json={"messages": [notice.body]})
