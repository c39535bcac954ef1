"""Restore detection in one process: the comparison rules (pure), the peer route that
reports consumption points (only to the pair's other station), and a hold with its
operator's release on real SQLite and PostgreSQL databases.

The rules follow from how the stations move (DEVELOPERS.md "Key delivery"): the
non-owner of a segment only advances by applying the owner's ``key.allocated``
messages, and the owner drops such a message from its outbox only once applied.
"""

from __future__ import annotations

import uuid
from datetime import UTC, datetime
from typing import Any

import pytest
from sqlalchemy import select

from conftest import Node
from keystrata.delivery import dec_keys
from keystrata.errors import Conflict, NotYetCompared, PairHeld
from keystrata.ledger.entries import Event
from keystrata.loopback.pki import cert_pin
from keystrata.registry import provisioning
from keystrata.registry.principals import Caller
from keystrata.registry.specs import Kind, PrincipalRole, PrincipalSpec
from keystrata.restore import comparison, holds, points, release
from keystrata.restore.rules import Behind, Finding, Point, Reason, compare, deliveries
from keystrata.storage.models import LedgerEntry, PairHold, PairSegment
from keystrata.storage.sealed import segment_context

A, C = "station-a", "station-c"
S1, S2 = "11111111-1111-4111-8111-111111111111", "22222222-2222-4222-8222-222222222222"


def pts(*items: tuple[str, str, int, int]) -> dict[str, Point]:
    return {seg: Point(seg, owner, used, unacked) for seg, owner, used, unacked in items}


# ---------------------------------------------------------------- the rules


def test_in_step_finds_nothing_even_with_allocations_on_their_way() -> None:
    mine = pts((S1, A, 300, 100), (S2, C, 50, 0))  # 100 bytes of S1 not yet acknowledged
    theirs = pts((S1, A, 200, 0), (S2, C, 80, 30))
    assert compare(A, mine, theirs, mine) == []


def test_restored_owner_finds_itself_behind_and_its_partner_agrees() -> None:
    owner_now = pts((S1, A, 100, 0))
    partner = pts((S1, A, 300, 0))  # applied 300 bytes of A's allocations
    assert compare(A, owner_now, partner, owner_now) == [
        Finding(Behind.SELF, Reason.OWNER_BEHIND, 1, 200)
    ]
    assert compare(C, partner, owner_now, partner) == [
        Finding(Behind.PARTNER, Reason.OWNER_BEHIND, 1, 200)
    ]


def test_restored_non_owner_finds_itself_behind_and_the_owner_agrees() -> None:
    owner = pts((S1, A, 300, 40))  # 260 acknowledged by C
    non_owner = pts((S1, A, 100, 0))
    assert compare(C, non_owner, owner, non_owner) == [
        Finding(Behind.SELF, Reason.NON_OWNER_BEHIND, 1, 160)
    ]
    assert compare(A, owner, non_owner, owner) == [
        Finding(Behind.PARTNER, Reason.NON_OWNER_BEHIND, 1, 160)
    ]


def test_a_segment_the_owner_lost_entirely_counts() -> None:
    partner = pts((S1, A, 64, 0))
    assert compare(A, {}, partner, {}) == [Finding(Behind.SELF, Reason.OWNER_BEHIND, 1, 64)]
    # A segment only this station holds is not compared (the relay's message may still
    # be on its way to the partner).
    assert compare(A, pts((S2, A, 0, 0)), {}, pts((S2, A, 0, 0))) == []


def test_reads_at_different_moments_give_no_false_finding() -> None:
    """The owner allocates and the partner applies between the owner's two readings:
    the rule that needs the newer own value uses ``after``, the other ``before``."""
    before = pts((S1, A, 100, 0))
    theirs = pts((S1, A, 164, 0))  # applied an allocation made after ``before``
    after = pts((S1, A, 164, 0))
    assert compare(A, before, theirs, after) == []
    # The non-owner's view: the owner moved on (and was acknowledged) while we read.
    mine_before, mine_after = pts((S1, A, 100, 0)), pts((S1, A, 164, 0))
    owner = pts((S1, A, 164, 0))
    assert compare(C, mine_before, owner, mine_after) == []


def test_forgotten_deliveries_show_against_what_the_partner_saw() -> None:
    # (own count now, what the partner saw of us, partner's count now, our mark of it)
    assert deliveries(5, 5, 7, 7) == []
    assert deliveries(2, 5, 7, 7) == [Finding(Behind.SELF, Reason.DELIVERIES_LOST, 3, 0)]
    assert deliveries(5, 5, 4, 7) == [Finding(Behind.PARTNER, Reason.DELIVERIES_LOST, 3, 0)]
    assert deliveries(0, None, None, 9) == []  # a later page, or an older partner


# ---------------------------------------------------------------- the peer route


def _add_peers(node: Node) -> None:
    pki_dir = node.ctx.settings.tls.cert.parent
    for station in ("station-b", "station-c"):
        provisioning.create(
            node.ctx,
            Kind.PRINCIPALS,
            PrincipalSpec.model_validate(
                {
                    "principal_id": f"peer-{station}",
                    "role": "peer",
                    "cert_subject": station,
                    "cert_sha256": cert_pin(pki_dir, station),
                    "node_id": station,
                }
            ),
            actor="test",
        )


def _segment(node: Node, seg: str, owner: str, key: bytes, used: int = 0) -> None:
    now = datetime.now(UTC)
    with node.ctx.db.write() as s:
        row = PairSegment(
            segment_id=seg,
            pair_id="pair-ac",
            side="notice",
            partner=C,
            owner=owner,
            length=len(key),
            used=used,
            epsilon=1e-9,
            state="ready",
            reason=None,
            link_applied=True,
            made_at=now,
            received_at=now,
            settled_at=now,
        )
        row.sealed = node.ctx.keyring.seal(key[used:], segment_context(row, used))
        s.add(row)


def test_progress_route_answers_only_the_pairs_other_station(station, api) -> None:
    _add_peers(station)
    _segment(station, S1, A, bytes(range(256)), used=32)
    path = "/api/v1/peer/pairs/pair-ac/progress"
    r = api(station)("station-c").get(path)
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["points"] == [{"segment_id": S1, "owner": A, "used": 32, "unacked": 0}]
    assert (body["pair_id"], body["station"], body["next_after"]) == ("pair-ac", A, None)
    # Station B is a peer of this node but not in pair-ac; the relay is no station of it.
    assert api(station)("station-b").get(path).status_code == 403
    assert api(station)("relay-1").get(path).status_code == 403
    assert api(station)("station-c").get("/api/v1/peer/pairs/pair-xx/progress").status_code == 403
    assert api(station)("ops-ada").get(path).status_code == 403  # not a peer


# ---------------------------------------------------------------- hold and release


class Partner:
    """The partner's side of the port (``ProgressSource``): the points it reports, and
    optionally its count of served keys and what it saw of ours."""

    def __init__(
        self,
        points: list[dict[str, Any]],
        fetched_keys: int | None = None,
        seen_fetched: int | None = None,
    ) -> None:
        self.points = points
        self.extra = {"fetched_keys": fetched_keys, "seen_fetched": seen_fetched}

    def pair_progress(
        self, node_id: str, pair_id: str, after: str | None, timeout: float
    ) -> dict[str, Any] | None:
        assert (node_id, pair_id, after) == (C, "pair-ac", None)
        return {
            "pair_id": pair_id,
            "station": C,
            "points": self.points,
            "next_after": None,
            **self.extra,
        }


A1 = Caller(principal_id="sae-a1", role=PrincipalRole.SAE, station_id=A)


def test_owner_behind_is_held_then_released_without_serving_a_byte_again(station) -> None:
    ctx = station.ctx
    key = bytes(range(256))
    _segment(station, S1, A, key, used=32)
    partner = Partner([{"segment_id": S1, "owner": A, "used": 96, "unacked": 0}])
    assert comparison.check_pair(ctx, partner, "pair-ac") == [
        Finding(Behind.SELF, Reason.OWNER_BEHIND, 1, 64)
    ]
    with pytest.raises(PairHeld) as held:
        holds.refuse_if_held(ctx, A1, "sae-c1")
    assert held.value.status == 503 and "operator must resolve it" in held.value.message
    with pytest.raises(PairHeld):
        dec_keys.get_keys_with_ids(ctx, A1, "sae-c1", [str(uuid.uuid4())])
    assert [h.reason for h in holds.open_holds(ctx)] == ["owner_behind"]
    # A second comparison adds no second finding.
    comparison.check_pair(ctx, partner, "pair-ac")
    assert len(holds.open_holds(ctx)) == 1

    done = release.release(ctx, partner, "pair-ac", actor="ops-ada", reason="restore")
    assert (done["segments_advanced"], done["bytes_destroyed"]) == (1, 64)
    with ctx.db.read() as s:
        row = s.get(PairSegment, S1)
        assert row is not None and row.used == 96
        assert row.sealed is not None
        # What is left starts where the partner's point stands: bytes 32..95 are gone.
        assert ctx.keyring.open(row.sealed, segment_context(row, 96)) == key[96:]
        hold = s.execute(select(PairHold)).scalar_one()
        assert (hold.released_by, hold.release_reason) == ("ops-ada", "restore")
        events = list(s.execute(select(LedgerEntry.event).order_by(LedgerEntry.idx)).scalars())
    assert events[-2:] == [Event.PAIR_HELD.value, Event.PAIR_RELEASED.value]
    holds.refuse_if_held(ctx, A1, "sae-c1")  # served again
    with pytest.raises(Conflict):
        release.release(ctx, partner, "pair-ac", actor="ops-ada", reason="again")


def test_partner_behind_is_recorded_and_closes_when_it_catches_up(station) -> None:
    ctx = station.ctx
    _segment(station, S1, A, bytes(256), used=128)
    behind = Partner([{"segment_id": S1, "owner": A, "used": 64, "unacked": 0}])
    assert comparison.check_pair(ctx, behind, "pair-ac") == [
        Finding(Behind.PARTNER, Reason.NON_OWNER_BEHIND, 1, 64)
    ]
    holds.refuse_if_held(ctx, A1, "sae-c1")  # this station keeps serving
    caught_up = Partner([{"segment_id": S1, "owner": A, "used": 128, "unacked": 0}])
    assert comparison.check_pair(ctx, caught_up, "pair-ac") == []
    assert holds.open_holds(ctx) == []


def test_malformed_partner_answer_changes_nothing(station) -> None:
    ctx = station.ctx
    _segment(station, S1, A, bytes(256), used=128)
    liar = Partner([{"segment_id": S1, "owner": A, "used": -5, "unacked": 0}])
    assert comparison.check_pair(ctx, liar, "pair-ac") is None
    liar = Partner([{"segment_id": S1, "owner": A, "used": True, "unacked": 0}])
    assert comparison.check_pair(ctx, liar, "pair-ac") is None
    assert holds.open_holds(ctx) == []


def test_a_partner_that_forgot_deliveries_is_found_and_this_station_keeps_serving(
    station,
) -> None:
    """The partner (the slaves' station of keys this station owns) showed 5 keys served,
    then, restored from a backup, shows 3: it could serve those 2 keys again."""
    ctx = station.ctx
    _segment(station, S1, A, bytes(256), used=64)
    point = [{"segment_id": S1, "owner": A, "used": 64, "unacked": 0}]
    assert (
        comparison.check_pair(ctx, Partner(point, fetched_keys=5, seen_fetched=0), "pair-ac") == []
    )
    found = comparison.check_pair(ctx, Partner(point, fetched_keys=3, seen_fetched=0), "pair-ac")
    assert found == [Finding(Behind.PARTNER, Reason.DELIVERIES_LOST, 2, 0)]
    holds.refuse_if_held(ctx, A1, "sae-c1")  # this station keeps serving
    assert [h.reason for h in holds.open_holds(ctx)] == ["deliveries_lost"]
    # The partner's operator released it (its count now starts at what we saw): closed.
    assert (
        comparison.check_pair(ctx, Partner(point, fetched_keys=5, seen_fetched=0), "pair-ac") == []
    )
    assert holds.open_holds(ctx) == []


def test_a_station_that_forgot_deliveries_holds_itself_until_released(station) -> None:
    """The partner saw this station serve 4 keys of its ownership; this station's
    database shows none (restored): it holds the pair, and the release raises its count
    so that the next comparison is in step and keys still waiting here are destroyed."""
    ctx = station.ctx
    _segment(station, S1, C, bytes(256), used=64)
    point = [{"segment_id": S1, "owner": C, "used": 64, "unacked": 0}]
    partner = Partner(point, fetched_keys=0, seen_fetched=4)
    assert comparison.check_pair(ctx, partner, "pair-ac") == [
        Finding(Behind.SELF, Reason.DELIVERIES_LOST, 4, 0)
    ]
    with pytest.raises(PairHeld):
        holds.refuse_if_held(ctx, A1, "sae-c1")
    done = release.release(ctx, partner, "pair-ac", actor="ops-ada", reason="restore")
    assert done["reasons"] == ["deliveries_lost"]
    with ctx.db.read() as s:
        assert points.fetched_keys(s, "pair-ac", C) == 4
    assert comparison.check_pair(ctx, partner, "pair-ac") == []
    holds.refuse_if_held(ctx, A1, "sae-c1")  # served again


def test_a_worker_that_cannot_ask_its_partner_at_start_serves_the_pair_nothing(station) -> None:
    """At start the partner does not answer: the pair stays closed in this process (503,
    try again) until a later round compares it; then it serves again."""
    from keystrata.restore import loop

    class Silent:
        def pair_progress(self, *args: Any, **kwargs: Any) -> None:
            return None

    ctx = station.ctx
    _segment(station, S1, A, bytes(256), used=64)
    loop.at_start(ctx, Silent())
    with pytest.raises(NotYetCompared) as early:
        holds.refuse_if_held(ctx, A1, "sae-c1")
    assert early.value.status == 503 and "try again" in early.value.message
    with pytest.raises(NotYetCompared):
        holds.refuse_pair_if_held(ctx, "pair-ac")
    loop.check_once(ctx, Silent(), "worker-1")  # still silent: still closed
    with pytest.raises(NotYetCompared):
        holds.refuse_if_held(ctx, A1, "sae-c1")
    in_step = Partner([{"segment_id": S1, "owner": A, "used": 64, "unacked": 0}])
    loop.check_once(ctx, in_step, "worker-1")
    holds.refuse_if_held(ctx, A1, "sae-c1")
    holds.refuse_pair_if_held(ctx, "pair-ac")
