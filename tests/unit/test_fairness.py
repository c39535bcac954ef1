"""Weighted max-min fair sharing of link key (``keystrata.relay.fairness``).

Outside references:

* Hand-worked examples: each one works the progressive filling out by hand in the
  comments (level t, link run-dry times (available - frozen) / unfrozen weight, pair
  demand times demand / weight) and the test compares the code with that arithmetic.
* The bottleneck characterisation of max-min fairness (Bertsekas and Gallager, *Data
  Networks*, 2nd ed., section 6.5, cited from memory), in its weighted form, used by the
  property tests as an oracle that does not share code with the filling algorithm: a
  feasible allocation is weighted max-min fair exactly when every pair either gets its
  demand or has a full link on which no pair has a larger share / weight. Because the
  fair allocation is unique, that oracle pins the exact shares down completely.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Mapping, Sequence
from fractions import Fraction
from random import Random

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from keystrata.relay.fairness import PairDemand, allocate, fair_shares, leftover

PLENTY = 10**6


def pair(pair_id: str, a: str, b: str, *, weight: int = 1, demand: int = PLENTY) -> PairDemand:
    return PairDemand(pair_id=pair_id, links=(a, b), weight=weight, demand=demand)


# ------------------------------------------------------------------ the oracle


def link_loads(
    pairs: Sequence[PairDemand], shares: Mapping[str, Fraction | int]
) -> dict[str, Fraction]:
    load: dict[str, Fraction] = defaultdict(Fraction)
    for p in pairs:
        for link in p.links:
            load[link] += shares[p.pair_id]
    return load


def fairness_violations(
    pairs: Sequence[PairDemand],
    available: Mapping[str, int],
    shares: Mapping[str, Fraction | int],
) -> list[str]:
    """Return why ``shares`` is not the weighted max-min fair allocation (empty if it is).

    Checks feasibility, then the bottleneck characterisation: each pair below its demand
    needs a link that is full and on which its share / weight is the largest.
    """
    problems: list[str] = []
    load = link_loads(pairs, shares)
    for link, used in load.items():
        if used > available.get(link, 0):
            problems.append(f"link {link} over-committed: {used} > {available.get(link, 0)}")
    for p in pairs:
        x = shares[p.pair_id]
        if not 0 <= x <= p.demand:
            problems.append(f"pair {p.pair_id} share {x} outside [0, {p.demand}]")
    for p in pairs:
        x = shares[p.pair_id]
        if x == p.demand:
            continue
        level = Fraction(x) / p.weight
        bottlenecks = [
            link
            for link in p.links
            if load[link] == available.get(link, 0)
            and all(
                Fraction(shares[q.pair_id]) / q.weight <= level for q in pairs if link in q.links
            )
        ]
        if not bottlenecks:
            problems.append(f"pair {p.pair_id} (share {x}) has no bottleneck link")
    return problems


def test_oracle_rejects_allocations_that_are_not_fair() -> None:
    # The oracle must be able to fail, or the property tests below prove nothing.
    # R-A = 100 shared by weights 1 and 3; the fair answer is 25 / 75 (worked below).
    pairs = [pair("ab", "R-A", "R-B", weight=1), pair("ac", "R-A", "R-C", weight=3)]
    available = {"R-A": 100, "R-B": PLENTY, "R-C": PLENTY}
    assert fairness_violations(pairs, available, {"ab": 25, "ac": 75}) == []
    # Equal split ignores the weights: "ab" (50 / 1 = 50) out-ranks "ac" (50 / 3) on
    # its only full link, so "ac" has no bottleneck.
    assert fairness_violations(pairs, available, {"ab": 50, "ac": 50}) != []
    # Feasible but wasteful: R-A is not full, so neither pair has a bottleneck.
    assert fairness_violations(pairs, available, {"ab": 20, "ac": 60}) != []
    # Over-commits R-A.
    assert fairness_violations(pairs, available, {"ab": 30, "ac": 75}) != []


# ------------------------------------------------------------------ hand-worked examples


def test_single_pair_is_limited_by_the_smaller_of_its_links() -> None:
    # One pair, weight 1, demand 1000; R-A = 100, R-B = 40.
    # R-A runs dry at t = 100 / 1 = 100, R-B at t = 40 / 1 = 40, demand at 1000 / 1.
    # The first event is t = 40: the pair freezes at 1 * 40 = 40 bytes.
    # Leftover: R-A 100 - 40 = 60, R-B 40 - 40 = 0.
    pairs = [pair("ab", "R-A", "R-B", demand=1000)]
    available = {"R-A": 100, "R-B": 40}
    got = allocate(pairs, available)
    assert got == {"ab": 40}
    assert leftover(pairs, available, got) == {"R-A": 60, "R-B": 0}


def test_two_pairs_share_a_common_link_equally() -> None:
    # Pairs (A,B) and (A,C), weights 1, demands 500; R-A = 100, R-B = R-C = 1000.
    # R-A carries both pairs, unfrozen weight 2: dry at t = 100 / 2 = 50.
    # R-B, R-C carry one pair each: dry at t = 1000. Demands at t = 500.
    # First event t = 50 (R-A): both freeze at 1 * 50 = 50.
    # Leftover: R-A 100 - 50 - 50 = 0, R-B = R-C = 1000 - 50 = 950.
    pairs = [pair("ab", "R-A", "R-B", demand=500), pair("ac", "R-A", "R-C", demand=500)]
    available = {"R-A": 100, "R-B": 1000, "R-C": 1000}
    got = allocate(pairs, available)
    assert got == {"ab": 50, "ac": 50}
    assert leftover(pairs, available, got) == {"R-A": 0, "R-B": 950, "R-C": 950}


def test_weights_one_to_three_share_a_bottleneck_one_to_three() -> None:
    # As above but weights 1 and 3, demands unlimited (10**6).
    # R-A unfrozen weight 1 + 3 = 4: dry at t = 100 / 4 = 25. Other links: t = 10**6.
    # First event t = 25: "ab" gets 1 * 25 = 25, "ac" gets 3 * 25 = 75; 25 + 75 = 100.
    pairs = [pair("ab", "R-A", "R-B", weight=1), pair("ac", "R-A", "R-C", weight=3)]
    available = {"R-A": 100, "R-B": PLENTY, "R-C": PLENTY}
    assert allocate(pairs, available) == {"ab": 25, "ac": 75}


def test_a_small_demand_frees_capacity_for_the_other_pair() -> None:
    # The classic max-min redistribution. R-A = 100, R-B = R-C = 10**6, weights 1.
    # "ab" wants 20, "ac" wants 500.
    # Round 1: R-A weight 2, dry at 100 / 2 = 50; "ab" full at 20 / 1 = 20;
    #          "ac" full at 500. First event t = 20: "ab" freezes at 20.
    # Round 2: R-A room 100 - 20 = 80, unfrozen weight 1: dry at 80 / 1 = 80;
    #          "ac" full at 500. First event t = 80: "ac" freezes at 80.
    # An equal split would have given 50 / 50 and wasted 30 bytes of "ab"'s half.
    pairs = [pair("ab", "R-A", "R-B", demand=20), pair("ac", "R-A", "R-C", demand=500)]
    available = {"R-A": 100, "R-B": PLENTY, "R-C": PLENTY}
    got = allocate(pairs, available)
    assert got == {"ab": 20, "ac": 80}
    assert leftover(pairs, available, got)["R-A"] == 0


def test_triangle_with_equal_weights() -> None:
    # Stations 1, 2, 3; L1 = 60, L2 = 100, L3 = 150; pairs (1,2) on L1+L2, (1,3) on L1+L3,
    # (2,3) on L2+L3; weights 1, demands unlimited.
    # Round 1: every link carries two pairs (weight 2):
    #          L1 dry at 60 / 2 = 30, L2 at 100 / 2 = 50, L3 at 150 / 2 = 75.
    #          First event t = 30 (L1): p12 and p13 freeze at 30.
    # Round 2: only p23 is left (weight 1 on L2 and L3).
    #          L2 room 100 - 30 (p12) = 70, dry at 70; L3 room 150 - 30 (p13) = 120, dry at 120.
    #          First event t = 70 (L2): p23 freezes at 70.
    # Loads: L1 30 + 30 = 60 (0 left), L2 30 + 70 = 100 (0 left), L3 30 + 70 = 100 (50 left).
    pairs = [pair("p12", "L1", "L2"), pair("p13", "L1", "L3"), pair("p23", "L2", "L3")]
    available = {"L1": 60, "L2": 100, "L3": 150}
    got = allocate(pairs, available)
    assert got == {"p12": 30, "p13": 30, "p23": 70}
    assert leftover(pairs, available, got) == {"L1": 0, "L2": 0, "L3": 50}


def test_triangle_three_rounds_demand_then_link_then_link() -> None:
    # Same links (L1 = 60, L2 = 100, L3 = 150), weights 1; p12 wants only 10.
    # Round 1: L1 dry at 60 / 2 = 30, L2 at 100 / 2 = 50, L3 at 150 / 2 = 75;
    #          p12 full at 10 / 1 = 10. First event t = 10: p12 freezes at 10.
    # Round 2: p13 and p23 left.
    #          L1 room 60 - 10 = 50, weight 1 (p13): dry at 50.
    #          L2 room 100 - 10 = 90, weight 1 (p23): dry at 90.
    #          L3 room 150, weight 2 (p13, p23): dry at 75.
    #          First event t = 50 (L1): p13 freezes at 50.
    # Round 3: p23 left. L2 room 90: dry at 90; L3 room 150 - 50 = 100: dry at 100.
    #          First event t = 90 (L2): p23 freezes at 90.
    # Loads: L1 10 + 50 = 60, L2 10 + 90 = 100, L3 50 + 90 = 140 (10 left).
    pairs = [
        pair("p12", "L1", "L2", demand=10),
        pair("p13", "L1", "L3"),
        pair("p23", "L2", "L3"),
    ]
    available = {"L1": 60, "L2": 100, "L3": 150}
    got = allocate(pairs, available)
    assert got == {"p12": 10, "p13": 50, "p23": 90}
    assert leftover(pairs, available, got) == {"L1": 0, "L2": 0, "L3": 10}


def test_weighted_triangle() -> None:
    # L1 = 60, L2 = 100, L3 = 150; weights p12 = 1, p13 = 2, p23 = 1; demands unlimited.
    # Round 1: L1 carries p12 + p13, weight 1 + 2 = 3: dry at 60 / 3 = 20.
    #          L2 carries p12 + p23, weight 2: dry at 100 / 2 = 50.
    #          L3 carries p13 + p23, weight 3: dry at 150 / 3 = 50.
    #          First event t = 20 (L1): p12 = 1 * 20 = 20, p13 = 2 * 20 = 40.
    # Round 2: p23 alone. L2 room 100 - 20 = 80: dry at 80; L3 room 150 - 40 = 110.
    #          First event t = 80 (L2): p23 = 80.
    # Loads: L1 20 + 40 = 60, L2 20 + 80 = 100, L3 40 + 80 = 120 (30 left).
    pairs = [
        pair("p12", "L1", "L2", weight=1),
        pair("p13", "L1", "L3", weight=2),
        pair("p23", "L2", "L3", weight=1),
    ]
    available = {"L1": 60, "L2": 100, "L3": 150}
    got = allocate(pairs, available)
    assert got == {"p12": 20, "p13": 40, "p23": 80}
    assert leftover(pairs, available, got) == {"L1": 0, "L2": 0, "L3": 30}


def test_zero_demand_and_missing_link_take_nothing() -> None:
    # "ab" has weight 5 but demand 0: full at t = 0 / 5 = 0, so it freezes at 0 at once.
    # "az" uses R-Z, which is not in ``available`` (0 bytes): dry at t = 0, frozen at 0.
    # Round 2: "ac" alone on R-A (room 100 - 0 - 0 = 100): dry at 100, R-C at 10**6.
    #          "ac" gets 100; neither zero pair held back any of R-A.
    pairs = [
        pair("ab", "R-A", "R-B", weight=5, demand=0),
        pair("ac", "R-A", "R-C"),
        pair("az", "R-A", "R-Z"),
    ]
    available = {"R-A": 100, "R-B": PLENTY, "R-C": PLENTY}
    got = allocate(pairs, available)
    assert got == {"ab": 0, "ac": 100, "az": 0}
    assert leftover(pairs, available, got) == {
        "R-A": 0,
        "R-B": PLENTY,
        "R-C": PLENTY - 100,
        "R-Z": 0,
    }


def test_everyone_gets_their_demand_when_key_is_plentiful() -> None:
    # R-A = 100 holds 30 + 40 = 70 <= 100; the other links hold far more.
    # Round 1: R-A dry at 100 / 2 = 50; "ab" full at 30, "ac" at 40. t = 30: "ab" = 30.
    # Round 2: R-A room 70, dry at 70; "ac" full at 40. t = 40: "ac" = 40. 30 bytes left.
    pairs = [pair("ab", "R-A", "R-B", demand=30), pair("ac", "R-A", "R-C", demand=40)]
    available = {"R-A": 100, "R-B": PLENTY, "R-C": PLENTY}
    got = allocate(pairs, available)
    assert got == {"ab": 30, "ac": 40}
    assert leftover(pairs, available, got)["R-A"] == 30


def test_rounding_down_never_over_commits() -> None:
    # R-A = 110 shared by two weight-1 pairs: dry at 110 / 2 = 55, each share is 55.
    # granularity 10: 55 / 10 = 5.5. Rounding to nearest (half up) would give 60 + 60 =
    # 120 > 110; rounding down gives 50 + 50 = 100 <= 110, leaving 10 on R-A.
    pairs = [pair("ab", "R-A", "R-B"), pair("ac", "R-A", "R-C")]
    available = {"R-A": 110, "R-B": PLENTY, "R-C": PLENTY}
    got = allocate(pairs, available, granularity=10)
    assert got == {"ab": 50, "ac": 50}
    assert leftover(pairs, available, got)["R-A"] == 10


def test_fractional_shares_round_down_to_whole_bytes() -> None:
    # R-A = 10, weights 1 and 2: dry at 10 / 3. Exact shares 10/3 = 3.33.. and
    # 20/3 = 6.66..; whole bytes (granularity 1) round down to 3 and 6: 9 <= 10, 1 left.
    pairs = [pair("ab", "R-A", "R-B", weight=1), pair("ac", "R-A", "R-C", weight=2)]
    available = {"R-A": 10, "R-B": PLENTY, "R-C": PLENTY}
    assert fair_shares(pairs, available) == {"ab": Fraction(10, 3), "ac": Fraction(20, 3)}
    got = allocate(pairs, available)
    assert got == {"ab": 3, "ac": 6}
    assert leftover(pairs, available, got)["R-A"] == 1


def test_coarse_granularity_can_leave_up_to_n_granules_per_link() -> None:
    # R-A = 100, three weight-1 pairs: dry at 100 / 3, each exact share 33 1/3.
    # granularity 40: 33 1/3 // 40 = 0, so every pair gets 0 and all 100 bytes stay.
    # 100 >= 40 = granularity, but 100 < 3 * 40 = 120: the efficiency bound used in the
    # property test below must be granularity * (pairs on the link), not granularity.
    pairs = [pair("ab", "R-A", "R-B"), pair("ac", "R-A", "R-C"), pair("ad", "R-A", "R-D")]
    available = {"R-A": 100, "R-B": PLENTY, "R-C": PLENTY, "R-D": PLENTY}
    got = allocate(pairs, available, granularity=40)
    assert got == {"ab": 0, "ac": 0, "ad": 0}
    assert leftover(pairs, available, got)["R-A"] == 100


def test_no_pairs() -> None:
    assert allocate([], {"R-A": 5}) == {}
    assert leftover([], {"R-A": 5}, {}) == {"R-A": 5}


# ------------------------------------------------------------------ validation


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"pair_id": ""}, "pair_id must be a non-empty string"),
        ({"links": ("R-A", "R-A")}, "the two links must differ"),
        ({"links": ("R-A",)}, "links must be a tuple of two"),
        ({"links": ("R-A", "")}, "links must be a tuple of two"),
        ({"links": ["R-A", "R-B"]}, "links must be a tuple of two"),
        ({"weight": 0}, "weight must be an integer >= 1"),
        ({"weight": 1.5}, "weight must be an integer >= 1"),
        ({"weight": True}, "weight must be an integer >= 1"),
        ({"demand": -1}, "demand must be an integer >= 0"),
        ({"demand": 2.0}, "demand must be an integer >= 0"),
    ],
)
def test_pair_demand_rejects_bad_fields(kwargs: dict[str, object], message: str) -> None:
    fields: dict[str, object] = {"pair_id": "ab", "links": ("R-A", "R-B"), "weight": 1, "demand": 1}
    fields.update(kwargs)
    with pytest.raises(ValueError, match=message):
        PairDemand(**fields)  # type: ignore[arg-type]


def test_allocate_rejects_bad_input() -> None:
    ab = pair("ab", "R-A", "R-B")
    with pytest.raises(ValueError, match="appears more than once"):
        allocate([ab, pair("ab", "R-A", "R-C")], {"R-A": 1})
    with pytest.raises(ValueError, match=r"available\['R-A'\] must be an integer >= 0"):
        allocate([ab], {"R-A": -1})
    with pytest.raises(ValueError, match="granularity must be an integer >= 1"):
        allocate([ab], {"R-A": 1}, granularity=0)


def test_leftover_rejects_bad_allocations() -> None:
    pairs = [pair("ab", "R-A", "R-B"), pair("ac", "R-A", "R-C")]
    available = {"R-A": 100, "R-B": 100, "R-C": 100}
    with pytest.raises(ValueError, match="over-commits link\\(s\\) 'R-A'"):
        leftover(pairs, available, {"ab": 60, "ac": 60})
    with pytest.raises(ValueError, match="unknown pair 'zz'"):
        leftover(pairs, available, {"zz": 1})
    with pytest.raises(ValueError, match=r"allocation\['ab'\] must be an integer >= 0"):
        leftover(pairs, available, {"ab": -1})


# ------------------------------------------------------------------ properties

LINKS = [f"R-{c}" for c in "ABCDEF"]
GRANULARITY = st.sampled_from([1, 2, 3, 16, 64, 256]) | st.integers(1, 300)


@st.composite
def scenarios(draw: st.DrawFn) -> tuple[list[PairDemand], dict[str, int]]:
    names = LINKS[: draw(st.integers(2, len(LINKS)))]
    # Some links may be missing from ``available`` on purpose: they count as 0 bytes.
    available = draw(st.dictionaries(st.sampled_from(names), st.integers(0, 1000)))
    pairs = []
    for i in range(draw(st.integers(0, 9))):
        a, b = draw(st.lists(st.sampled_from(names), min_size=2, max_size=2, unique=True))
        weight = draw(st.integers(1, 6))
        demand = draw(st.integers(0, 1200))
        pairs.append(PairDemand(f"p{i}", (a, b), weight, demand))
    return pairs, available


def pairs_on(pairs: Sequence[PairDemand], link: str) -> int:
    return sum(link in p.links for p in pairs)


@settings(max_examples=300)
@given(scenarios())
def test_exact_shares_are_weighted_max_min_fair(
    scenario: tuple[list[PairDemand], dict[str, int]],
) -> None:
    # Why this holds: when progressive filling freezes a pair below its demand, it is
    # because one of its links L ran dry at the current level t. From then on every pair
    # on L is frozen, so L stays full; pairs on L that froze earlier did so at levels
    # <= t, so their share / weight is <= t = this pair's share / weight. L is therefore
    # a bottleneck in the oracle's sense. The oracle does not share code with the filling.
    pairs, available = scenario
    shares = fair_shares(pairs, available)
    assert set(shares) == {p.pair_id for p in pairs}
    assert fairness_violations(pairs, available, shares) == []


@settings(max_examples=150)
@given(scenarios(), GRANULARITY)
def test_allocation_is_feasible(
    scenario: tuple[list[PairDemand], dict[str, int]], granularity: int
) -> None:
    # Rounding each exact share down only lowers every link's sum, and the exact
    # allocation is feasible, so the rounded one is too.
    pairs, available = scenario
    got = allocate(pairs, available, granularity=granularity)
    assert set(got) == {p.pair_id for p in pairs}
    assert list(got) == sorted(got)  # documented: keyed by pair_id in sorted order
    for p in pairs:
        assert isinstance(got[p.pair_id], int)
        assert 0 <= got[p.pair_id] <= p.demand
        assert got[p.pair_id] % granularity == 0
    for link, used in link_loads(pairs, got).items():
        assert used <= available.get(link, 0)


@settings(max_examples=150)
@given(scenarios(), GRANULARITY)
def test_allocation_is_the_exact_share_rounded_down(
    scenario: tuple[list[PairDemand], dict[str, int]], granularity: int
) -> None:
    # The rounding rule itself: the largest multiple of granularity not above the share.
    pairs, available = scenario
    exact = fair_shares(pairs, available)
    got = allocate(pairs, available, granularity=granularity)
    for pid, share in exact.items():
        assert got[pid] <= share < got[pid] + granularity


@settings(max_examples=150)
@given(scenarios(), GRANULARITY)
def test_allocation_is_pareto_efficient_up_to_granularity(
    scenario: tuple[list[PairDemand], dict[str, int]], granularity: int
) -> None:
    # Claim: if pair p ends at least one granule short of its demand (d_p - r_p >= g),
    # one of its links L has less than g * n_L bytes left, n_L = number of pairs on L.
    # Proof: let x be the exact shares and r the rounded ones, so 0 <= x_q - r_q < g.
    # If x_p = d_p then d_p - r_p = x_p - r_p < g, contrary to the assumption; so
    # x_p < d_p and, by the bottleneck property, some link L of p is exactly full under
    # x: sum of x_q over pairs q on L = available[L]. Then what L has left under r is
    # available[L] - sum r_q = sum (x_q - r_q) < g * n_L.
    # The bound g alone would be false: see the coarse-granularity example above.
    pairs, available = scenario
    got = allocate(pairs, available, granularity=granularity)
    left = leftover(pairs, available, got)
    assert list(left) == sorted(left)  # documented: keyed by link in sorted order
    for p in pairs:
        if p.demand - got[p.pair_id] >= granularity:
            assert any(left[link] < granularity * pairs_on(pairs, link) for link in p.links)


@settings(max_examples=100)
@given(scenarios(), GRANULARITY, st.data())
def test_input_order_does_not_change_the_result(
    scenario: tuple[list[PairDemand], dict[str, int]], granularity: int, data: st.DataObject
) -> None:
    pairs, available = scenario
    expected = allocate(pairs, available, granularity=granularity)
    shuffled = data.draw(st.permutations(pairs))
    # Also swap the two links of some pairs: (R-A, R-B) and (R-B, R-A) are the same pair.
    flips = data.draw(st.lists(st.booleans(), min_size=len(pairs), max_size=len(pairs)))
    reordered = [
        PairDemand(p.pair_id, (p.links[1], p.links[0]), p.weight, p.demand) if flip else p
        for p, flip in zip(shuffled, flips, strict=True)
    ]
    reversed_available = dict(reversed(list(available.items())))
    got = allocate(reordered, reversed_available, granularity=granularity)
    assert list(got.items()) == list(expected.items())


@settings(max_examples=100)
@given(scenarios(), st.integers(2, 7))
def test_scaling_every_weight_changes_nothing(
    scenario: tuple[list[PairDemand], dict[str, int]], factor: int
) -> None:
    # Multiplying every weight by k divides every event level by k and leaves every
    # share w * t unchanged, so the exact allocation must be identical.
    pairs, available = scenario
    scaled = [PairDemand(p.pair_id, p.links, p.weight * factor, p.demand) for p in pairs]
    assert fair_shares(scaled, available) == fair_shares(pairs, available)


def test_hundred_pairs_on_fifty_links() -> None:
    # The size the relay works at: the oracle checks the exact result, and rounding down
    # to 64-byte granules stays feasible.
    rng = Random(20240611)
    links = [f"L{i:02}" for i in range(50)]
    pairs = []
    for i in range(100):
        a, b = rng.sample(links, 2)
        pairs.append(PairDemand(f"p{i:03}", (a, b), rng.randint(1, 9), rng.randint(0, 50_000)))
    available = {link: rng.randint(0, 100_000) for link in links}
    shares = fair_shares(pairs, available)
    assert fairness_violations(pairs, available, shares) == []
    got = allocate(pairs, available, granularity=64)
    assert all(v >= 0 for v in leftover(pairs, available, got).values())
