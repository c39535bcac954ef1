"""Binary entropy and the Shor-Preskill rate (``keystrata_physics.entropy``).

References: scipy's ``scipy.stats.entropy`` (a general-purpose reference library) for the
binary entropy, scipy's ``brentq`` root finder for the threshold, and Shor and Preskill,
PRL 85, 441 (2000), for the 11.0 % threshold of ``1 - 2 h2(e)``.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy.optimize import brentq
from scipy.stats import entropy

from keystrata_physics.entropy import SHOR_PRESKILL_THRESHOLD, h2, shor_preskill_rate


@pytest.mark.parametrize("p", [1e-12, 1e-6, 0.01, 0.033, 0.11, 0.25, 0.5, 0.75, 0.999999])
def test_h2_matches_scipy(p: float) -> None:
    # scipy.stats.entropy of the distribution (p, 1 - p) in base 2 is the binary entropy.
    assert h2(p) == pytest.approx(float(entropy([p, 1.0 - p], base=2)), rel=1e-12, abs=1e-15)


def test_h2_end_points_and_maximum() -> None:
    # The limit x log2 x -> 0 at 0 gives h2(0) = h2(1) = 0; the maximum is 1 bit at 1/2.
    assert h2(0.0) == 0.0
    assert h2(1.0) == 0.0
    assert h2(0.5) == pytest.approx(1.0, abs=1e-15)


@given(st.floats(min_value=0.0, max_value=1.0))
def test_h2_is_symmetric_and_within_one_bit(p: float) -> None:
    assert 0.0 <= h2(p) <= 1.0 + 1e-15
    assert h2(p) == pytest.approx(h2(1.0 - p), abs=1e-12)


def test_shor_preskill_threshold_is_eleven_percent() -> None:
    # Shor and Preskill 2000: 1 - 2 h2(e) = 0 at e = 11.0 %. scipy's brentq finds the root
    # independently of the module's bisection.
    root = brentq(lambda e: 1.0 - 2.0 * float(entropy([e, 1.0 - e], base=2)), 0.01, 0.4, xtol=1e-14)
    threshold = SHOR_PRESKILL_THRESHOLD
    assert threshold == pytest.approx(root, abs=1e-12)
    assert round(threshold, 3) == 0.110


def test_shor_preskill_rate_values() -> None:
    assert shor_preskill_rate(0.0) == 1.0
    # 1 - 2 h2(0.05) with h2 from scipy.
    expected = 1.0 - 2.0 * float(entropy([0.05, 0.95], base=2))
    assert shor_preskill_rate(0.05) == pytest.approx(expected, rel=1e-12)
    assert shor_preskill_rate(SHOR_PRESKILL_THRESHOLD * 0.999) > 0.0
    assert shor_preskill_rate(SHOR_PRESKILL_THRESHOLD * 1.001) == 0.0
    assert shor_preskill_rate(0.5) == 0.0


@given(st.floats(min_value=0.0, max_value=0.5), st.floats(min_value=0.0, max_value=0.5))
def test_shor_preskill_rate_falls_with_the_error_rate(a: float, b: float) -> None:
    low, high = sorted((a, b))
    assert shor_preskill_rate(low) >= shor_preskill_rate(high) >= 0.0


@pytest.mark.parametrize("p", [-0.1, 1.1, math.nan, math.inf])
def test_h2_refuses_a_non_probability(p: float) -> None:
    with pytest.raises(ValueError, match=r"^p must be in \[0, 1\]"):
        h2(p)


@pytest.mark.parametrize("qber", [-1e-9, 0.51, math.nan])
def test_shor_preskill_rate_refuses_a_bad_qber(qber: float) -> None:
    with pytest.raises(ValueError, match=r"^qber must be in \[0, 0.5\]"):
        shor_preskill_rate(qber)
