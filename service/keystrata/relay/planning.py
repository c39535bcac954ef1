"""Planning at the relay, as plain arithmetic: how much ready key a pair should hold,
and which station owns the next segment. :mod:`keystrata.relay.fairness` shares the link
key among pairs; :mod:`keystrata.relay.scheduler` calls both.
"""

from __future__ import annotations

#: The least share of a pair's owned key each side keeps, whatever its recent demand, so
#: that a side whose encryptors start again finds key at once (its demand shows only
#: after its first requests).
MIN_SHARE = 0.1


def owned_share(demand_a: float, demand_b: float) -> float:
    """Side a's share of the pair's owned key: proportional to recent demand (equal
    while neither side has any), and never below :data:`MIN_SHARE` for either side."""
    if demand_a <= 0 and demand_b <= 0:
        return 0.5
    return min(1 - MIN_SHARE, max(MIN_SHARE, demand_a / (demand_a + demand_b)))


def choose_owner(
    a: str, b: str, demand_a: float, demand_b: float, owned_a: int, owned_b: int
) -> str:
    """Owner of a new segment: the side furthest below its share of owned key, where the
    shares are proportional to recent demand (equal while neither side has demand).

    Ties go to the first station in ID order, so the choice is deterministic.
    """
    share_a = owned_share(demand_a, demand_b)
    total_owned = owned_a + owned_b
    # Deficit of each side against its proportional share of what is owned so far.
    gap_a = share_a * (total_owned + 1) - owned_a
    gap_b = (1 - share_a) * (total_owned + 1) - owned_b
    if gap_a > gap_b or (gap_a == gap_b and a < b):
        return a
    return b


def buffer_target(
    *, consumption_bps: float | None, horizon_s: float, minimum: int, default: int, maximum: int
) -> int:
    """Ready key (bits) a pair should hold: enough for ``horizon_s`` at its measured
    consumption, within the policy's bounds; ``default`` while nothing was measured."""
    if consumption_bps is None:
        return max(minimum, min(default, maximum))
    return int(max(minimum, min(consumption_bps * horizon_s, maximum)))


def pair_deficit(
    *,
    target: int,
    ready: int,
    in_flight: int,
    demand_a: float,
    demand_b: float,
    owned_a: int,
    owned_b: int,
) -> int:
    """Bits of pair key the relay should add: what the pair lacks of its target, or,
    when more is owned by a side that consumes little, what the sides lack of their
    demand-proportional shares of the target. A segment's owner is fixed once both
    stations hold it, so key owned by an idle side does not serve the busy one.
    """
    short = target - ready - in_flight
    if demand_a <= 0 and demand_b <= 0:
        return short
    share_a = owned_share(demand_a, demand_b)
    lacking = (
        max(0.0, share_a * target - owned_a)
        + max(0.0, (1 - share_a) * target - owned_b)
        - in_flight
    )
    return int(max(short, lacking))
