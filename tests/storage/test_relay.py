"""The trusted relay end to end in one process: relay operations, messages, confirmation,
tampering, and the invariants of the design (no link byte used twice, no one-sided
segment, the relay keeps no pair key)."""

from __future__ import annotations

import base64
import json

import pytest
from sqlalchemy import select

import relaynet
from helpers import ledger_events, link_bytes
from keystrata.crypto.hazmat import xor_bytes
from keystrata.relay import operation
from keystrata.storage.models import LinkBlock, OutboxMessage, RelayOp


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    return relaynet.build(make_node, db_factory)


def test_segment_reaches_both_stations_identical(net) -> None:
    net.feed("station-a", 4)
    net.feed("station-b", 4)
    made = operation.make_segment(net.relay.ctx, relaynet.PAIR, 10_000)
    net.drain()
    a, b = net.segments("station-a"), net.segments("station-b")
    assert a[made.segment_id].state == b[made.segment_id].state == "ready"
    assert net.key_digest("station-a", made.segment_id) == net.key_digest(
        "station-b", made.segment_id
    )
    assert a[made.segment_id].owner == b[made.segment_id].owner == made.owner
    with net.relay.ctx.db.read() as s:
        assert s.get(RelayOp, made.segment_id).state == "ready"
        assert s.execute(select(OutboxMessage)).first() is None
    assert "segment.ready" in ledger_events(net.a.ctx)
    assert "segment.ready" in ledger_events(net.b.ctx)


def test_xor_recovery_matches_an_independent_computation(net) -> None:
    """KA = C xor KB, recomputed here with a per-byte loop (independent of xor_bytes)."""
    net.feed("station-a", 2)
    net.feed("station-b", 2)
    made = operation.make_segment(net.relay.ctx, relaynet.PAIR, 3000, cipher_station="station-b")
    msgs = {m.kind: m for _, m in net.pending()}
    body = msgs["relay.ciphertext"].body
    header = json.loads(base64.b64decode(body["header"]))
    ciphertext = base64.b64decode(body["ciphertext"])
    # Read KB at station B before the message consumes it.
    ctx_b = net.b.ctx
    from keystrata.storage.sealed import block_context

    kb = b""
    with ctx_b.db.read() as s:
        for r in header["cipher_key_ranges"]:
            row = s.execute(select(LinkBlock).where(LinkBlock.block_id == r["block"])).scalar_one()
            rest = ctx_b.keyring.open(
                row.sealed, block_context(row.link_id, row.block_id, row.used)
            )
            kb += rest[r["offset"] - row.used : r["offset"] - row.used + r["length"]]
    expected_ka = bytes(c ^ k for c, k in zip(ciphertext, kb, strict=True))
    assert xor_bytes(ciphertext, kb) == expected_ka
    net.drain()
    import hashlib

    assert net.key_digest("station-b", made.segment_id) == hashlib.sha256(expected_ka).hexdigest()


def test_both_tags_recomputed_from_the_documented_layout(net) -> None:
    """The relay's two one-time MACs, recomputed here from the layout DEVELOPERS.md
    documents (tag = Poly1305(M, len(header) as 4 bytes big-endian || header || C),
    tagA = Poly1305(MA, len(header) || header)) with the Poly1305 of the ``cryptography``
    package called directly (RFC 8439 section 2.5), not through keystrata's wrapper; the
    header is RFC 8785 canonical JSON (checked with the ``rfc8785`` package)."""
    import rfc8785
    from cryptography.hazmat.primitives.poly1305 import Poly1305

    net.feed("station-a", 2)
    net.feed("station-b", 2)
    operation.make_segment(net.relay.ctx, relaynet.PAIR, 3000, cipher_station="station-b")
    msgs = {m.kind: m.body for _, m in net.pending()}
    notice, cipher = msgs["relay.notice"], msgs["relay.ciphertext"]
    header = base64.b64decode(notice["header"], validate=True)  # RFC 4648 section 4
    assert base64.b64decode(cipher["header"]) == header  # one header for both stations
    fields = json.loads(header)
    assert rfc8785.dumps(fields) == header
    assert fields["v"] == 2 and fields["length"] == 3000
    ciphertext = base64.b64decode(cipher["ciphertext"])
    ka = link_bytes(net.a, fields["notice_key_ranges"])
    ma = link_bytes(net.a, fields["notice_mac_ranges"])
    kb = link_bytes(net.b, fields["cipher_key_ranges"])
    m = link_bytes(net.b, fields["cipher_mac_ranges"])
    assert len(ma) == len(m) == 32 and len(ka) == len(kb) == 3000
    assert ciphertext == bytes(x ^ y for x, y in zip(ka, kb, strict=True))
    framed = len(header).to_bytes(4, "big") + header
    assert base64.b64decode(notice["tag"]) == Poly1305.generate_tag(ma, framed)
    assert base64.b64decode(cipher["tag"]) == Poly1305.generate_tag(m, framed + ciphertext)


def test_relay_destroys_link_key_and_keeps_no_pair_key(net) -> None:
    net.feed("station-a", 1, block_bytes=5000)
    net.feed("station-b", 1, block_bytes=5000)
    operation.make_segment(net.relay.ctx, relaynet.PAIR, 4000, cipher_station="station-b")
    with net.relay.ctx.db.read() as s:
        rows = {r.link_id: r for r in s.execute(select(LinkBlock)).scalars()}
        tables = set(s.execute(select(OutboxMessage.kind)).scalars())
    # Each link gives the segment's bytes and a 32-byte one-time MAC key.
    assert rows["link-a"].used == 4032 and rows["link-b"].used == 4032
    # What is left is sealed from the new offset; the used bytes are gone.
    from keystrata.storage.sealed import block_context

    left = net.relay.ctx.keyring.open(
        rows["link-a"].sealed, block_context("link-a", rows["link-a"].block_id, 4032)
    )
    assert len(left) == 968
    assert tables == {"relay.notice", "relay.ciphertext"}
    # Invariant 4: no pair key at the relay: no table holds segment key.
    with net.relay.ctx.db.read() as s:
        from keystrata.storage.models import PairSegment

        assert s.execute(select(PairSegment)).first() is None


def test_tampered_ciphertext_is_refused_and_discarded_on_both_sides(net) -> None:
    net.feed("station-a", 3)
    net.feed("station-b", 3)
    good = operation.make_segment(net.relay.ctx, relaynet.PAIR, 2000, cipher_station="station-b")
    bad = operation.make_segment(net.relay.ctx, relaynet.PAIR, 2000, cipher_station="station-b")
    # Flip one bit of the second segment's ciphertext in the relay's outbox.
    with net.relay.ctx.db.write() as s:
        row = s.execute(
            select(OutboxMessage).where(
                OutboxMessage.segment_id == bad.segment_id, OutboxMessage.kind == "relay.ciphertext"
            )
        ).scalar_one()
        body = json.loads(row.body)
        c = bytearray(base64.b64decode(body["ciphertext"]))
        c[7] ^= 0x01
        body["ciphertext"] = base64.b64encode(bytes(c)).decode()
        row.body = json.dumps(body).encode()
    net.drain()
    a, b = net.segments("station-a"), net.segments("station-b")
    assert a[bad.segment_id].state == b[bad.segment_id].state == "discarded"
    assert b[bad.segment_id].reason == "bad_tag"
    assert a[bad.segment_id].sealed is None and b[bad.segment_id].sealed is None
    # Nothing else is affected.
    assert a[good.segment_id].state == b[good.segment_id].state == "ready"
    assert net.key_digest("station-a", good.segment_id) == net.key_digest(
        "station-b", good.segment_id
    )
    assert "segment.message_refused" in ledger_events(net.b.ctx)
    with net.relay.ctx.db.read() as s:
        assert s.get(RelayOp, bad.segment_id).state == "discarded"
    # Later segments still flow: the link bytes stayed in step.
    later = operation.make_segment(net.relay.ctx, relaynet.PAIR, 2000)
    net.drain()
    assert net.segments("station-a")[later.segment_id].state == "ready"


def test_messages_out_of_order_wait_and_resends_are_harmless(net) -> None:
    net.feed("station-a", 4)
    net.feed("station-b", 4)
    first = operation.make_segment(net.relay.ctx, relaynet.PAIR, 3000, cipher_station="station-b")
    second = operation.make_segment(net.relay.ctx, relaynet.PAIR, 3000, cipher_station="station-b")
    msgs = net.pending()
    later = [(snd, m) for snd, m in msgs if m.segment_id == second.segment_id]
    # The second segment's messages first: their link bytes follow the first's.
    assert {net.deliver(snd, m) for snd, m in later} == {"409"}
    # Deliver everything with every reply lost once: all resends are idempotent.
    for snd, m in net.pending():
        net.deliver(snd, m, lose_reply=True)
    net.drain()
    for seg in (first, second):
        assert net.segments("station-a")[seg.segment_id].state == "ready"
        assert net.segments("station-b")[seg.segment_id].state == "ready"


def test_unconfirmed_segment_expires_on_both_sides(net) -> None:
    from datetime import UTC, datetime, timedelta

    from keystrata.relay import confirmation

    net.feed("station-a", 2)
    net.feed("station-b", 2)
    made = operation.make_segment(net.relay.ctx, relaynet.PAIR, 2000, cipher_station="station-b")
    # Only the notice reaches A; the ciphertext to B is held back.
    for snd, m in net.pending():
        if m.kind == "relay.notice":
            net.deliver(snd, m)
    expired = confirmation.expire_pending(net.a.ctx, datetime.now(UTC) + timedelta(seconds=1))
    assert expired == 1
    net.drain()
    assert net.segments("station-a")[made.segment_id].state == "discarded"
    assert net.segments("station-b")[made.segment_id].state == "discarded"
    assert net.segments("station-b")[made.segment_id].sealed is None


def test_messages_from_strangers_are_refused(net) -> None:
    net.feed("station-a", 2)
    net.feed("station-b", 2)
    operation.make_segment(net.relay.ctx, relaynet.PAIR, 2000, cipher_station="station-b")
    for _, m in net.pending():
        # station-b pretending to be the relay
        from keystrata.errors import Forbidden
        from keystrata.node import dispatch

        if m.destination == "station-a":
            with pytest.raises(Forbidden):
                dispatch.handle(net.a.ctx, "station-b", dict(m.body))


def test_epsilon_is_composed_and_capped(make_node, db_factory) -> None:
    net = relaynet.build(make_node, db_factory, policy={"max_epsilon": 5e-10})
    net.feed("station-a", 2, block_bytes=1000, epsilon=1e-10)
    net.feed("station-b", 2, block_bytes=1000, epsilon=2e-10)
    # 1500 bytes and a 32-byte MAC key from each link: two blocks of link-a (2e-10) and
    # two of link-b (4e-10): 6e-10 > 5e-10, refused; nothing is consumed.
    with pytest.raises(operation.EpsilonTooLarge):
        operation.make_segment(net.relay.ctx, relaynet.PAIR, 1500, cipher_station="station-b")
    # 500 bytes: one block on each link: 1e-10 + 2e-10 = 3e-10 (union bound).
    made = operation.make_segment(net.relay.ctx, relaynet.PAIR, 500, cipher_station="station-b")
    assert made.epsilon == pytest.approx(3e-10)


def test_kek_rotation_reseals_pair_key_segments(net, tmp_path) -> None:
    from keystrata.config import load_settings
    from keystrata.crypto.kek import read_kek, write_new_kek
    from keystrata.node import kek_rotation
    from keystrata.node.lifecycle import open_node

    net.feed("station-a", 2)
    net.feed("station-b", 2)
    made = operation.make_segment(net.relay.ctx, relaynet.PAIR, 3000)
    net.drain()
    before = net.key_digest("station-a", made.segment_id)
    ctx = net.a.ctx
    new_path = tmp_path / "a-new.kek"
    write_new_kek(new_path)
    report = kek_rotation.rotate(
        ctx.db, ctx.node_id, read_kek(ctx.settings.kek.file), read_kek(new_path)
    )
    assert report.resealed_segments == 1
    net.a.ctx = open_node(
        load_settings(net.a.config_path, env={"KEYSTRATA_KEK__FILE": str(new_path)}), ctx.db
    )
    assert net.key_digest("station-a", made.segment_id) == before
