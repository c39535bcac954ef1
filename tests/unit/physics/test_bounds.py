"""The repeaterless (PLOB) bound (``keystrata_physics.bounds``).

Reference: Pirandola, Laurenza, Ottaviani and Banchi, Nat. Commun. 8, 15043 (2017):
``-log2(1 - eta)`` bits per use, about ``1.44 eta`` at high loss. The logarithm is checked
against mpmath at 50 digits (a general-purpose arbitrary-precision library).
"""

from __future__ import annotations

import math

import mpmath
import pytest
from hypothesis import given
from hypothesis import strategies as st

from keystrata_physics.bounds import plob_bits_per_use, plob_bps


@pytest.mark.parametrize("eta", [1e-15, 1e-10, 1e-6, 1e-3, 0.1, 0.5, 0.9, 0.999, 1.0 - 1e-12])
def test_plob_matches_mpmath(eta: float) -> None:
    with mpmath.workdps(50):
        expected = float(-mpmath.log(1 - mpmath.mpf(eta), 2))
    assert plob_bits_per_use(eta) == pytest.approx(expected, rel=1e-14)


def test_plob_at_high_loss_is_about_1_44_eta() -> None:
    # PLOB 2017: -log2(1 - eta) ~ eta / ln 2 = 1.44 eta for small eta.
    for eta in (1e-8, 1e-5, 1e-3):
        assert plob_bits_per_use(eta) / eta == pytest.approx(1.0 / math.log(2.0), rel=1e-3)
    assert round(1.0 / math.log(2.0), 2) == 1.44


def test_plob_at_the_physics_sheet_losses() -> None:
    # /work/shared/physics.md quotes 2.28, 0.55 and 0.15 bits per use at 1, 5 and 10 dB
    # (computed from the formula, not published).
    for db, expected in ((1.0, 2.28), (5.0, 0.55), (10.0, 0.15)):
        assert round(plob_bits_per_use(10.0 ** (-db / 10.0)), 2) == expected


def test_no_light_gives_no_key() -> None:
    assert plob_bits_per_use(0.0) == 0.0
    assert plob_bps(0.0, 1e9) == 0.0


@given(st.floats(min_value=0.0, max_value=0.999), st.floats(min_value=0.0, max_value=0.999))
def test_plob_grows_with_transmittance(a: float, b: float) -> None:
    low, high = sorted((a, b))
    assert plob_bits_per_use(low) <= plob_bits_per_use(high)


def test_plob_bps_is_per_use_times_clock() -> None:
    eta = 10.0 ** (-3.0)
    assert plob_bps(eta, 1e9) == pytest.approx(plob_bits_per_use(eta) * 1e9, rel=1e-15)


@pytest.mark.parametrize("eta", [-0.01, 1.0, 1.5, math.nan])
def test_plob_refuses_a_bad_transmittance(eta: float) -> None:
    with pytest.raises(ValueError, match=r"^transmittance must be in \[0, 1\)"):
        plob_bits_per_use(eta)


@pytest.mark.parametrize("clock", [0.0, -1.0, math.inf, math.nan])
def test_plob_bps_refuses_a_bad_clock(clock: float) -> None:
    with pytest.raises(ValueError, match=r"^clock_hz must be a positive finite number"):
        plob_bps(0.1, clock)
