"""Planning at the relay, as plain arithmetic: how much ready key a pair should hold,
and which station owns the next segment. :mod:`keystrata.relay.fairness` shares the link
key among pairs; :mod:`keystrata.relay.scheduler` calls both.
"""

from __future__ import annotations


def choose_owner(
    a: str, b: str, demand_a: float, demand_b: float, owned_a: int, owned_b: int
) -> str:
    """Owner of a new segment: the side furthest below its share of owned key, where the
    shares are proportional to recent demand (equal while neither side has demand).

    Ties go to the first station in ID order, so the choice is deterministic.
    """
    if demand_a <= 0 and demand_b <= 0:
        demand_a = demand_b = 1.0
    total_owned = owned_a + owned_b
    # Deficit of each side against its proportional share of what is owned so far.
    share_a = demand_a / (demand_a + demand_b)
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
