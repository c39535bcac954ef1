"""Segments made several to a transaction at the relay, and runs of segment messages
applied in one transaction at the receiver (each message in a savepoint): every segment
stays whole (its own header, MACs, record, messages and ledger entry), link bytes follow
one another without gap or reuse, and a refusal inside a run keeps what applied before
it and nothing of itself. On SQLite and PostgreSQL (the ``net`` fixture)."""

from __future__ import annotations

import base64
import json
from collections import defaultdict

import pytest
from sqlalchemy import func, select

import relaynet
from helpers import ledger_events
from keystrata.node import dispatch
from keystrata.peering import outbox
from keystrata.relay import operation
from keystrata.storage.models import LinkBlock, RelayOp


@pytest.fixture
def net(make_node, db_factory) -> relaynet.RelayNet:
    return relaynet.build(make_node, db_factory)


def _used(node: relaynet.Node) -> int:
    with node.ctx.db.read() as s:
        return int(s.execute(select(func.coalesce(func.sum(LinkBlock.used), 0))).scalar_one())


def _headers(net: relaynet.RelayNet, kind: str) -> list[dict]:
    return [
        json.loads(base64.b64decode(m.body["header"])) for _, m in net.pending() if m.kind == kind
    ]


def _carry_in_batches(net: relaynet.RelayNet, rounds: int = 20) -> None:
    """Deliver every node's due messages as the sender does: one batch per destination,
    through ``dispatch.handle_batch``; forget what was acknowledged."""
    for _ in range(rounds):
        by_route: dict[tuple[str, str], list] = defaultdict(list)
        for sender, message in net.pending():
            by_route[(sender, message.destination)].append(message)
        if not by_route:
            return
        for (sender, destination), batch in by_route.items():
            results = dispatch.handle_batch(
                net.nodes[destination].ctx, sender, [m.body for m in batch]
            )
            done = [m.id for m, r in zip(batch, results, strict=False) if r.status == 200]
            outbox.delivered(net.nodes[sender].ctx.db, done)


def test_segments_of_one_transaction_are_each_whole_and_follow_one_another(net) -> None:
    net.feed("station-a", 4)
    net.feed("station-b", 4)
    plan = [operation.Planned(3000), operation.Planned(5000, "station-b"), operation.Planned(2000)]
    made, error = operation.make_segments(net.relay.ctx, relaynet.PAIR, plan)
    assert error is None
    assert [m.length for m in made] == [3000, 5000, 2000]
    assert len({m.segment_id for m in made}) == 3
    assert made[1].owner == "station-b"
    # Each segment's key and MAC ranges start where the previous segment's ended.
    for kind, side in (("relay.notice", "notice"), ("relay.ciphertext", "cipher")):
        ends: list[tuple[str, int]] = []
        for header in _headers(net, kind):
            ranges = header[f"{side}_key_ranges"] + header[f"{side}_mac_ranges"]
            if ends:
                assert (ranges[0]["block"], ranges[0]["offset"]) == ends[-1] or ranges[0][
                    "offset"
                ] == 0
            last = ranges[-1]
            ends.append((last["block"], last["offset"] + last["length"]))
    assert ledger_events(net.relay.ctx).count("relay.segment_made") == 3
    _carry_in_batches(net)
    a, b = net.segments("station-a"), net.segments("station-b")
    for m in made:
        assert a[m.segment_id].state == b[m.segment_id].state == "ready"
        assert net.key_digest("station-a", m.segment_id) == net.key_digest(
            "station-b", m.segment_id
        )
    with net.relay.ctx.db.read() as s:
        assert set(s.execute(select(RelayOp.state)).scalars()) == {"ready"}
    # Every link byte used once: each end of each link spent 10,000 + 3 x 32 bytes.
    assert _used(net.relay) == 2 * (10_000 + 3 * 32)
    assert _used(net.a) == _used(net.b) == 10_000 + 3 * 32


def test_a_batch_stops_at_the_first_segment_the_links_cannot_cover(net) -> None:
    net.feed("station-a", 2)  # 8192 bytes per link
    net.feed("station-b", 2)
    plan = [operation.Planned(4000), operation.Planned(4000), operation.Planned(100)]
    made, error = operation.make_segments(net.relay.ctx, relaynet.PAIR, plan)
    assert [m.length for m in made] == [4000, 4000]
    assert error is not None and error.status == 409
    # Nothing of the third was taken: 8192 - 2 x 4032 = 128 bytes left on each link.
    assert _used(net.relay) == 2 * 2 * 4032
    assert ledger_events(net.relay.ctx).count("relay.segment_made") == 2


def test_a_refusal_inside_a_run_keeps_what_applied_before_it_and_nothing_of_itself(net) -> None:
    net.feed("station-a", 4)
    net.feed("station-b", 4)
    for n in (3000, 3000, 3000):
        operation.make_segment(net.relay.ctx, relaynet.PAIR, n, cipher_station="station-b")
    ciphertexts = [m for _, m in net.pending() if m.kind == "relay.ciphertext"]
    first, second, third = ciphertexts
    # The third before the second: its link bytes are not at the front yet ("not yet").
    results = dispatch.handle_batch(net.b.ctx, "relay-1", [first.body, third.body, second.body])
    assert [r.status for r in results] == [200, 409]
    segments = net.segments("station-b")
    assert segments[first.segment_id].state == "pending"
    assert third.segment_id not in segments and second.segment_id not in segments
    assert _used(net.b) == 3032
    # Resent in order, the rest applies.
    results = dispatch.handle_batch(net.b.ctx, "relay-1", [second.body, third.body])
    assert [r.outcome for r in results] == ["applied", "applied"]
    assert _used(net.b) == 3 * 3032
