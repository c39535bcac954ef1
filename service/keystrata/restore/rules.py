"""Restore detection: the rules that compare two stations' consumption points of a pair.

Each segment of a pair has one owner (the station that hands its bytes to masters) and
a non-owner (the station that stores them for slaves). The non-owner's consumption point
(``used``) only moves by applying the owner's ``key.allocated`` messages, and the owner
deletes such a message from its outbox only after the non-owner applied it. So, at any
moment, for every segment::

    owner.used - unacked  <=  non_owner.used  <=  owner.used

where ``unacked`` is the bytes of that segment in allocations still in the owner's
outbox to the non-owner. A station whose database lost commits (a restored backup, a
power loss with unsafe durability settings) breaks one side:

* ``non_owner.used > owner.used``: the owner lost commits and would hand bytes out again
  under new key IDs (reason ``owner_behind``);
* ``owner.used - unacked > non_owner.used``: the non-owner lost commits and may serve a
  delivered key again (reason ``non_owner_behind``).

The two stations are not read at the same instant. The points only grow, so each
inequality is tested with the reads in the order that cannot give a false finding: the
caller reads its own points, then the partner's, then its own again, and uses the first
reading where its value must be the older one and the second where it must be newer.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from enum import StrEnum


class Behind(StrEnum):
    SELF = "self"
    PARTNER = "partner"


class Reason(StrEnum):
    OWNER_BEHIND = "owner_behind"
    NON_OWNER_BEHIND = "non_owner_behind"
    #: Keys served to slaves were forgotten: fewer served than the partner has seen.
    DELIVERIES_LOST = "deliveries_lost"


@dataclass(frozen=True)
class Point:
    """One segment's consumption point at one station (no key material)."""

    segment_id: str
    owner: str
    used: int
    #: Owner only: bytes of this segment in allocations still in its outbox to the
    #: partner (0 at the non-owner).
    unacked: int = 0

    @property
    def acknowledged(self) -> int:
        """Bytes the partner has certainly applied (the owner's view)."""
        return self.used - self.unacked


@dataclass(frozen=True)
class Finding:
    """Which station is behind, why, on how many segments and by how many bytes."""

    behind: Behind
    reason: Reason
    segments: int
    bytes_behind: int


@dataclass
class _Tally:
    segments: int = 0
    bytes_behind: int = 0


def compare(
    me: str,
    before: Mapping[str, Point],
    theirs: Mapping[str, Point],
    after: Mapping[str, Point],
) -> list[Finding]:
    """Compare this station's points (read ``before`` and ``after`` the partner's) with
    the partner's ``theirs``; return the findings, at most one per (behind, reason).

    A segment the partner holds and this station does not counts as consumption point
    0 here: if the partner applied allocations of it from us, we had it and lost it.
    A segment only this station holds is not compared (the relay's message may still
    be on its way to the partner).
    """
    tally: dict[tuple[Behind, Reason], _Tally] = {}

    def note(behind: Behind, reason: Reason, by: int) -> None:
        t = tally.setdefault((behind, reason), _Tally())
        t.segments += 1
        t.bytes_behind += by

    for seg, other in theirs.items():
        mine_old, mine_new = before.get(seg), after.get(seg)
        owner = mine_new.owner if mine_new is not None else other.owner
        old_used = mine_old.used if mine_old is not None else 0
        new_used = mine_new.used if mine_new is not None else 0
        if owner == me:
            # Our newer reading must be at least what the partner applied.
            if other.used > new_used:
                note(Behind.SELF, Reason.OWNER_BEHIND, other.used - new_used)
            # What the partner has certainly applied, by our older reading.
            acked = old_used - (mine_old.unacked if mine_old is not None else 0)
            if acked > other.used:
                note(Behind.PARTNER, Reason.NON_OWNER_BEHIND, acked - other.used)
        else:
            # We (non-owner) never exceed the owner: our older reading vs theirs.
            if old_used > other.used:
                note(Behind.PARTNER, Reason.OWNER_BEHIND, old_used - other.used)
            # What the owner knows we applied, vs our newer reading.
            if other.acknowledged > new_used:
                note(Behind.SELF, Reason.NON_OWNER_BEHIND, other.acknowledged - new_used)
    return [
        Finding(behind, reason, t.segments, t.bytes_behind)
        for (behind, reason), t in sorted(tally.items())
    ]


def deliveries(
    own_now: int, seen_by_partner: int | None, partner_now: int | None, partner_seen: int
) -> list[Finding]:
    """The delivery rule. A station's count of served keys (of the partner's ownership)
    only grows, and each station keeps the highest count its partner has shown it.

    * ``own_now`` (read after the partner answered) below ``seen_by_partner`` (what the
      partner saw of us earlier): this station forgot deliveries and may serve those
      keys again;
    * ``partner_now`` below ``partner_seen`` (our mark of the partner): the partner did.

    The findings count keys in ``segments`` (``bytes_behind`` is 0).
    """
    out = []
    if seen_by_partner is not None and own_now < seen_by_partner:
        out.append(Finding(Behind.SELF, Reason.DELIVERIES_LOST, seen_by_partner - own_now, 0))
    if partner_now is not None and partner_now < partner_seen:
        out.append(Finding(Behind.PARTNER, Reason.DELIVERIES_LOST, partner_seen - partner_now, 0))
    return out
