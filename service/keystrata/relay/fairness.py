"""Sharing scarce link key among station pairs by weighted max-min fairness.

The relay holds one QKD link to each station; link L has ``available[L]`` bytes of key.
A pair (A, B) that receives x bytes of pair key spends x bytes on link R-A *and* x bytes
on link R-B, so every pair sits on exactly two links and competes on both. Each pair has
a weight w (its priority) and a demand d (it never receives more than d).

Weighted max-min fairness
-------------------------
Call x_p / w_p the *weighted share* of pair p. A feasible allocation (no link
over-committed, no pair above its demand) is weighted max-min fair when no pair can get
more without taking from a pair whose weighted share is smaller than or equal to its own
on a common bottleneck link. Equivalently (the bottleneck characterisation): every pair p
either receives its demand, or has a *bottleneck link* L on its path, one that is fully
used and on which no other pair has a larger weighted share than p. The fair allocation
exists and is unique.

Progressive filling
-------------------
The allocation is computed by "filling the pipes" together. A common level t rises from
0; every unfrozen pair holds w_p * t bytes. A pair freezes, keeping what it has, when it
reaches its demand (t = d_p / w_p) or when one of its links runs dry. Between events
everything is linear, so the next event is found directly rather than by small steps:
with F_L the bytes frozen pairs hold on link L and W_L the sum of the weights of the
unfrozen pairs on L, link L runs dry at t = (available[L] - F_L) / W_L. The smallest of
these times and the pairs' demand times is the next level; every pair it stops is frozen
and the filling goes on with the rest. Each round freezes at least one pair, so there are
at most as many rounds as pairs, each costing O(#pairs + #links).

The levels are exact :class:`fractions.Fraction` values, so ties (two links running dry
at the same level) are seen exactly and the result does not depend on the order of the
input. Only at the end is each pair's exact share rounded *down* to a multiple of the
requested granularity; rounding every share down can only lower the sum on a link, so
the rounded allocation never over-commits a link. The price is at most
``granularity`` bytes per pair left unallocated (see :func:`allocate`).

Source: progressive filling and the bottleneck characterisation of max-min fairness are
textbook material: D. Bertsekas and R. Gallager, *Data Networks*, 2nd ed., Prentice
Hall, 1992, chapter 6 on flow control, section 6.5 (max-min flow control); section
numbers cited from memory. The weighted form is the usual generalisation of that
treatment, applying it to the rates divided by their weights; a demand acts like a
private link of capacity d_p used by p alone. The code here is our own.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from fractions import Fraction

__all__ = ["PairDemand", "allocate", "fair_shares", "leftover"]


def _is_int(value: object) -> bool:
    # bool is an int subclass; True bytes or a weight of True is a caller bug.
    return isinstance(value, int) and not isinstance(value, bool)


def _is_name(value: object) -> bool:
    return isinstance(value, str) and value != ""


@dataclass(frozen=True, slots=True)
class PairDemand:
    """One station pair's request for this round.

    ``links`` names the two relay links the pair draws from (R-A and R-B); ``weight`` is
    its priority (a positive integer) and ``demand`` the bytes it wants (never exceeded).

    Raises:
        ValueError: an empty ``pair_id``, ``links`` not two different non-empty names,
            ``weight`` not an integer >= 1, or ``demand`` not an integer >= 0.
    """

    pair_id: str
    links: tuple[str, str]
    weight: int
    demand: int

    def __post_init__(self) -> None:
        if not _is_name(self.pair_id):
            raise ValueError(f"pair_id must be a non-empty string, got {self.pair_id!r}")
        links: object = self.links
        if not (isinstance(links, tuple) and len(links) == 2 and all(map(_is_name, links))):
            raise ValueError(
                f"pair {self.pair_id!r}: links must be a tuple of two non-empty link names, "
                f"got {links!r}"
            )
        if links[0] == links[1]:
            raise ValueError(
                f"pair {self.pair_id!r}: the two links must differ, got {links[0]!r} twice"
            )
        if not _is_int(self.weight) or self.weight < 1:
            raise ValueError(
                f"pair {self.pair_id!r}: weight must be an integer >= 1, got {self.weight!r}"
            )
        if not _is_int(self.demand) or self.demand < 0:
            raise ValueError(
                f"pair {self.pair_id!r}: demand must be an integer >= 0 bytes, got {self.demand!r}"
            )


def _check_inputs(pairs: Sequence[PairDemand], available: Mapping[str, int]) -> None:
    seen: set[str] = set()
    for pair in pairs:
        if pair.pair_id in seen:
            raise ValueError(f"pair_id {pair.pair_id!r} appears more than once")
        seen.add(pair.pair_id)
    for link, amount in available.items():
        if not _is_int(amount) or amount < 0:
            raise ValueError(f"available[{link!r}] must be an integer >= 0 bytes, got {amount!r}")


def fair_shares(pairs: Sequence[PairDemand], available: Mapping[str, int]) -> dict[str, Fraction]:
    """Return the exact weighted max-min fair allocation, before any rounding.

    The result maps every ``pair_id`` (in sorted order) to its share in bytes as a
    :class:`~fractions.Fraction`. A link missing from ``available`` has 0 bytes.

    Raises:
        ValueError: a ``pair_id`` appears twice, or an ``available`` value is not an
            integer >= 0.
    """
    _check_inputs(pairs, available)
    active = {pair.pair_id: pair for pair in sorted(pairs, key=lambda p: p.pair_id)}
    links = sorted({link for pair in pairs for link in pair.links})
    room = {link: Fraction(available.get(link, 0)) for link in links}
    shares: dict[str, Fraction] = {}

    while active:
        weight_on = dict.fromkeys(links, 0)
        for pair in active.values():
            for link in pair.links:
                weight_on[link] += pair.weight
        # ``room`` already excludes what frozen pairs hold, so a link with unfrozen weight
        # W runs dry at level room / W. An active pair holds weight * level on each link,
        # so this level is never below the current one.
        dry_at = {link: room[link] / w for link, w in weight_on.items() if w > 0}
        full_at = {pid: Fraction(pair.demand, pair.weight) for pid, pair in active.items()}
        level = min(min(dry_at.values()), min(full_at.values()))
        dry = {link for link, at in dry_at.items() if at == level}
        stopped = [
            pid
            for pid, pair in active.items()
            if full_at[pid] == level or not dry.isdisjoint(pair.links)
        ]
        for pid in stopped:
            pair = active.pop(pid)
            share = pair.weight * level
            shares[pid] = share
            for link in pair.links:
                room[link] -= share

    return {pid: shares[pid] for pid in sorted(shares)}


def allocate(
    pairs: Sequence[PairDemand], available: Mapping[str, int], *, granularity: int = 1
) -> dict[str, int]:
    """Return the bytes each pair receives this round, keyed by ``pair_id`` in sorted order.

    Every pair is present (0 when it gets nothing). Each value is the pair's exact
    weighted max-min fair share (:func:`fair_shares`) rounded down to a multiple of
    ``granularity``, so for every link L the pairs using L together receive at most
    ``available[L]`` bytes, and no pair receives more than its demand. Rounding leaves
    less than ``granularity`` bytes per pair unallocated. The result does not depend on
    the order of ``pairs`` or of ``available``.

    Raises:
        ValueError: ``granularity`` is not an integer >= 1, a ``pair_id`` appears twice,
            or an ``available`` value is not an integer >= 0.
    """
    if not _is_int(granularity) or granularity < 1:
        raise ValueError(f"granularity must be an integer >= 1 bytes, got {granularity!r}")
    return {
        pid: (share // granularity) * granularity
        for pid, share in fair_shares(pairs, available).items()
    }


def leftover(
    pairs: Sequence[PairDemand], available: Mapping[str, int], allocation: Mapping[str, int]
) -> dict[str, int]:
    """Return the bytes each link keeps after ``allocation``, keyed by link in sorted order.

    The result covers every link in ``available`` and every link a pair names (a link
    missing from ``available`` has 0 bytes). A pair missing from ``allocation`` counts as
    receiving 0 bytes.

    Raises:
        ValueError: a ``pair_id`` appears twice, an ``available`` value is not an integer
            >= 0, ``allocation`` names an unknown pair or holds a value that is not an
            integer >= 0, or the allocation over-commits a link.
    """
    _check_inputs(pairs, available)
    known = {pair.pair_id for pair in pairs}
    for pid, amount in allocation.items():
        if pid not in known:
            raise ValueError(f"allocation names unknown pair {pid!r}")
        if not _is_int(amount) or amount < 0:
            raise ValueError(f"allocation[{pid!r}] must be an integer >= 0 bytes, got {amount!r}")
    links = set(available) | {link for pair in pairs for link in pair.links}
    left = {link: available.get(link, 0) for link in sorted(links)}
    for pair in pairs:
        for link in pair.links:
            left[link] -= allocation.get(pair.pair_id, 0)
    over = [link for link, amount in left.items() if amount < 0]
    if over:
        raise ValueError(f"allocation over-commits link(s) {', '.join(map(repr, over))}")
    return left
