"""Key supply of a station pair (``keystrata_physics.supply``).

Outside references, each named beside its check:

- physics.md, "Supply and buffers": a segment of n bytes uses n bytes of link R-A and
  n + 32 of link R-B (the one-time MAC key), so a pair gets at most
  min(R_A, R_B n / (n + 32)); checked in exact rational arithmetic and by counting the
  bytes of whole segments;
- exponential cloud spells of mean b (common practice as a first model): a spell outlasts
  a buffer B at demand d with probability exp(-B / (d b)), so B = d b ln(1 / P); checked
  by a seeded Monte Carlo of spell lengths;
- time until empty: the buffer's balance ready - (demand - supply) t, stepped in time.
"""

from __future__ import annotations

import inspect
import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from keystrata_physics import supply

rates = st.floats(0.0, 1e12, allow_nan=False)


# ---------------------------------------------------------------- pair ceiling


@pytest.mark.parametrize(
    ("rate_a", "rate_b", "segment", "expected"),
    [
        # R-B limits: 1,000 bit/s of R-B carry 1000 x 32 / 64 = 500 bit/s of 32-byte segments
        (1e6, 1000.0, 32, Fraction(500)),
        # R-A limits: R-B has room for the MAC as well
        (1000.0, 1e6, 256 * 1024, Fraction(1000)),
        # the default 256 KiB segment: R-B x 262144 / 262176
        (5e4, 5e4, 256 * 1024, Fraction(50_000) * 262_144 / 262_176),
        (0.0, 1e6, 1024, Fraction(0)),
        (1e6, 0.0, 1024, Fraction(0)),
        (1.0, 1.0, 1, Fraction(1, 33)),
    ],
)
def test_pair_ceiling_by_hand(
    rate_a: float, rate_b: float, segment: int, expected: Fraction
) -> None:
    """physics.md: min(R_A, R_B n / (n + 32)), the right side in exact fractions."""
    assert supply.MAC_KEY_BYTES == 32
    value = supply.pair_ceiling_bps(rate_a, rate_b, segment)
    assert value == pytest.approx(float(expected), rel=1e-15, abs=0.0)


@given(rates, rates, st.integers(1, 1 << 24))
def test_pair_ceiling_is_the_min_of_both_links(rate_a: float, rate_b: float, segment: int) -> None:
    value = supply.pair_ceiling_bps(rate_a, rate_b, segment)
    exact = min(Fraction(rate_a), Fraction(rate_b) * segment / (segment + 32))
    assert value == pytest.approx(float(exact), rel=1e-15, abs=1e-300)
    assert value <= rate_a and value <= rate_b


@pytest.mark.parametrize(
    ("rate_a", "rate_b", "segment"),
    [(8e6, 8e6, 1024), (8e6, 4e6, 4096), (2e6, 9e6, 256 * 1024), (1e7, 8.0 * 33 * 100, 1)],
)
def test_pair_ceiling_counts_the_bytes_of_whole_segments(
    rate_a: float, rate_b: float, segment: int
) -> None:
    """Over T seconds, k segments spend k n bytes of R-A and k (n + 32) bytes of R-B; the
    most segments both links' bytes allow, times n bytes, over T approaches the ceiling
    from below (to one segment in T)."""
    seconds = 1000
    budget_a = int(rate_a * seconds) // 8
    budget_b = int(rate_b * seconds) // 8
    segments = min(budget_a // segment, budget_b // (segment + 32))
    assert segments * segment <= budget_a and segments * (segment + 32) <= budget_b
    counted_bps = segments * segment * 8 / seconds
    ceiling = supply.pair_ceiling_bps(rate_a, rate_b, segment)
    assert counted_bps <= ceiling + 1e-9
    assert ceiling - counted_bps <= (segment + 32) * 8 / seconds + 1e-9


# ---------------------------------------------------------------- buffers and spells


def test_buffer_by_hand() -> None:
    """B = d b ln(1 / P): 1 kbit/s, spells of an hour, P = 1 %: 3.6e6 x 4.60517 bits."""
    assert supply.buffer_for_spell_bits(1000.0, 3600.0, 0.01) == pytest.approx(
        3.6e6 * 4.605170186, rel=1e-9
    )
    assert supply.buffer_for_spell_bits(0.0, 3600.0, 0.01) == 0.0


@pytest.mark.parametrize("probability", [0.5, 0.1, 0.01])
def test_a_monte_carlo_of_spells_drains_the_buffer_with_the_chance_asked(
    probability: float,
) -> None:
    """Spells exponential of mean b (seeded numpy): the share of spells longer than the
    buffer lasts (B / d) is P, within four binomial standard errors."""
    demand, mean_spell = 2_500.0, 5_400.0
    buffer = supply.buffer_for_spell_bits(demand, mean_spell, probability)
    spells = np.random.default_rng(31_337).exponential(mean_spell, 400_000)
    drained = float((spells * demand > buffer).mean())
    error = math.sqrt(probability * (1.0 - probability) / spells.size)
    assert abs(drained - probability) < 4.0 * error, (drained, probability)
    # and the inverse says the same of that buffer
    assert supply.spell_shortfall_probability(buffer, demand, mean_spell) == pytest.approx(
        probability, rel=1e-12
    )


def test_shortfall_probability_by_hand() -> None:
    """exp(-B / (d b)): a buffer of two spells' demand runs dry in e^-2 = 13.53 % of them."""
    assert supply.spell_shortfall_probability(2 * 10 * 60.0, 10.0, 60.0) == pytest.approx(
        math.exp(-2.0), rel=1e-15
    )
    assert supply.spell_shortfall_probability(0.0, 10.0, 60.0) == 1.0
    # no demand or no spells: nothing runs dry
    assert supply.spell_shortfall_probability(100.0, 0.0, 60.0) == 0.0
    assert supply.spell_shortfall_probability(100.0, 10.0, 0.0) == 0.0


@given(
    st.floats(1e-3, 1e9),
    st.floats(1.0, 1e6),
    st.floats(1e-12, 1.0, exclude_max=True),
)
def test_shortfall_probability_inverts_the_buffer(
    demand: float, mean_spell: float, probability: float
) -> None:
    buffer = supply.buffer_for_spell_bits(demand, mean_spell, probability)
    back = supply.spell_shortfall_probability(buffer, demand, mean_spell)
    assert back == pytest.approx(probability, rel=1e-9)


# ---------------------------------------------------------------- time until empty


@pytest.mark.parametrize(("demand", "supply_bps"), [(100.0, 100.0), (100.0, 250.0), (0.0, 0.0)])
def test_a_supply_that_keeps_up_never_empties(demand: float, supply_bps: float) -> None:
    assert supply.seconds_until_empty(1e6, demand, supply_bps) == math.inf


def test_time_until_empty_steps_the_balance() -> None:
    """ready 1e6 bits, demand 300 bit/s, supply 50 bit/s: the balance, stepped a second
    at a time, is gone after 4,000 s."""
    ready, balance, seconds = 1e6, 1e6, 0
    while balance > 0:
        balance += 50.0 - 300.0
        seconds += 1
    assert supply.seconds_until_empty(ready, 300.0, 50.0) == pytest.approx(seconds)
    assert supply.seconds_until_empty(0.0, 300.0, 50.0) == 0.0


# ---------------------------------------------------------------- refusals

BAD = [-1.0, -1e-9, math.nan, math.inf, -math.inf, "10", None, True]


@pytest.mark.parametrize("value", BAD)
@pytest.mark.parametrize(
    ("call", "name", "args"),
    [
        (supply.pair_ceiling_bps, "rate_a_bps", (1.0, 2.0, 64)),
        (supply.pair_ceiling_bps, "rate_b_bps", (1.0, 2.0, 64)),
        (supply.buffer_for_spell_bits, "demand_bps", (1.0, 2.0, 0.1)),
        (supply.buffer_for_spell_bits, "mean_spell_s", (1.0, 2.0, 0.1)),
        (supply.spell_shortfall_probability, "buffer_bits", (1.0, 2.0, 3.0)),
        (supply.spell_shortfall_probability, "demand_bps", (1.0, 2.0, 3.0)),
        (supply.spell_shortfall_probability, "mean_spell_s", (1.0, 2.0, 3.0)),
        (supply.seconds_until_empty, "ready_bits", (1.0, 2.0, 3.0)),
        (supply.seconds_until_empty, "demand_bps", (1.0, 2.0, 3.0)),
        (supply.seconds_until_empty, "supply_bps", (1.0, 2.0, 3.0)),
    ],
)
def test_bad_numbers_are_refused_naming_the_argument(
    call: object, name: str, args: tuple[float, ...], value: object
) -> None:
    assert callable(call)
    names = list(inspect.signature(call).parameters)
    given_args = dict(zip(names, args, strict=True)) | {name: value}
    with pytest.raises(ValueError, match=rf"^{name} must be"):
        call(**given_args)


@pytest.mark.parametrize("segment", [0, -32, 1.5, 64.0, "64", None, True])
def test_bad_segment_sizes_are_refused(segment: object) -> None:
    with pytest.raises(ValueError, match=r"^segment_bytes must be a positive integer"):
        supply.pair_ceiling_bps(1.0, 1.0, segment)  # type: ignore[arg-type]


@pytest.mark.parametrize("probability", [0.0, 1.0, -0.1, 1.5, math.nan, "0.01", None])
def test_bad_shortfall_probabilities_are_refused(probability: object) -> None:
    with pytest.raises(ValueError, match=r"^shortfall_probability must be in \(0, 1\)"):
        supply.buffer_for_spell_bits(1.0, 1.0, probability)  # type: ignore[arg-type]
