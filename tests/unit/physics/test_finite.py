"""Finite-key decoy BB84 (``keystrata_physics.finite``), after Lim, Curty, Walenta, Xu and
Zbinden, PRA 89, 022307 (2014).

The module is written from memory of that paper (its docstring lists every formula), so
these tests check what follows from the paper's construction rather than figures from it:

* the finite-size terms only take key away: the key per pulse stays below that of the
  same protocol with infinitely long blocks, and the estimated single-photon detections
  and phase error never beat their true values in the link model;
* with infinitely long blocks the bounds are Ma, Qi, Zhao and Lo's vacuum + weak decoy
  bounds (PRA 72, 012326 (2005)), so the limit is composed here from ``decoy_bb84``'s
  ``Y1_L`` and ``e1_U`` and the link's gains written out in this file;
* the Hoeffding deviations make the gap to the limit shrink as ``1 / sqrt(N)``
  (Hoeffding, J. Am. Stat. Assoc. 58, 13 (1963));
* the key length loses exactly ``log2(2 / eps_cor)`` to correctness (Lim et al. 2014).
"""

from __future__ import annotations

import itertools
import math

import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy.stats import entropy

from keystrata_physics.bb84 import Bb84Params, DecoyMethod, decoy_bb84
from keystrata_physics.finite import FiniteParams, finite_decoy_bb84, finite_decoy_bb84_limit

Y0 = 1e-6


def fibre_eta(km: float) -> float:
    # A receiver of 10 % behind 0.2 dB/km of fibre (common practice for such examples).
    return 0.1 * 10.0 ** (-0.2 * km / 10.0)


def binary_entropy(p: float) -> float:
    return float(entropy([p, 1.0 - p], base=2))


def poisson(k: float, n: int) -> float:
    return math.exp(-k) * k**n / math.factorial(n)


def link_gain(eta: float, y0: float, k: float) -> float:
    return 1.0 - (1.0 - y0) * math.exp(-eta * k)


def composed_limit(eta: float, y0: float, fp: FiniteParams, decoy: DecoyMethod) -> float:
    """``q_x^2 {tau_0 Y0 + tau_1 Y1 [1 - h2(e1)] - f Q_X h2(E_X)}`` with ``Y1`` and ``e1``
    from ``decoy_bb84`` (vacuum + weak bounds for the same mu and nu, or true values)."""
    asym = decoy_bb84(
        eta, y0, Bb84Params(mu=fp.mu, nu=fp.nu, misalignment=fp.misalignment), decoy=decoy
    )
    pairs = list(zip(fp.intensities, fp.probabilities, strict=True))
    tau0 = sum(p * poisson(k, 0) for k, p in pairs)
    tau1 = sum(p * poisson(k, 1) for k, p in pairs)
    q_x = sum(p * link_gain(eta, y0, k) for k, p in pairs)
    eq_x = sum(p * (y0 / 2 + fp.misalignment * (link_gain(eta, y0, k) - y0)) for k, p in pairs)
    y1, e1 = asym.single_photon_yield_lower, asym.single_photon_error_upper
    key = tau0 * y0 + tau1 * y1 * (1.0 - binary_entropy(e1))
    key -= fp.ec_efficiency * q_x * binary_entropy(eq_x / q_x)
    return fp.basis_probability**2 * key


@pytest.mark.parametrize("km", [0.0, 25.0, 50.0, 100.0])
def test_limit_is_the_vacuum_and_weak_decoy_key_of_the_same_protocol(km: float) -> None:
    fp = FiniteParams()
    limit = finite_decoy_bb84_limit(fibre_eta(km), Y0, fp)
    assert limit == pytest.approx(composed_limit(fibre_eta(km), Y0, fp, "vacuum+weak"), rel=1e-9)
    assert limit <= composed_limit(fibre_eta(km), Y0, fp, "infinite")


@pytest.mark.parametrize("km", [0.0, 50.0, 100.0])
def test_finite_key_tends_to_the_limit(km: float) -> None:
    fp = FiniteParams()
    eta = fibre_eta(km)
    limit = finite_decoy_bb84_limit(eta, Y0, fp)
    rates = [finite_decoy_bb84(eta, Y0, fp, pulses=10.0**e).key_per_pulse for e in (12, 15, 18)]
    assert all(r < limit for r in rates)
    assert rates == sorted(rates)
    assert rates[-1] == pytest.approx(limit, rel=1e-3)


def test_gap_to_the_limit_shrinks_as_one_over_root_n() -> None:
    # Hoeffding deviations grow as sqrt(N) against counts that grow as N.
    fp = FiniteParams()
    eta = fibre_eta(50.0)
    limit = finite_decoy_bb84_limit(eta, Y0, fp)
    gaps = [
        1.0 - finite_decoy_bb84(eta, Y0, fp, pulses=10.0**e).key_per_pulse / limit
        for e in (16, 17, 18)
    ]
    for wider, narrower in itertools.pairwise(gaps):
        assert wider / narrower == pytest.approx(math.sqrt(10.0), rel=0.03)


def test_no_key_from_a_short_block() -> None:
    fp = FiniteParams()
    eta = fibre_eta(50.0)
    short = finite_decoy_bb84(eta, Y0, fp, pulses=1e8)
    assert short.secret_bits == 0.0 and short.key_per_pulse == 0.0 and not short.positive
    long = finite_decoy_bb84(eta, Y0, fp, pulses=1e13)
    assert long.positive and long.secret_bits > 0.0


def test_key_grows_with_the_block() -> None:
    fp = FiniteParams()
    eta = fibre_eta(25.0)
    blocks = [10.0 ** (e / 4.0) for e in range(24, 73)]  # 1e6 to 1e18
    results = [finite_decoy_bb84(eta, Y0, fp, pulses=n) for n in blocks]
    bits = [r.secret_bits for r in results]
    per_pulse = [r.key_per_pulse for r in results]
    assert bits == sorted(bits) and per_pulse == sorted(per_pulse)
    assert bits[0] == 0.0 and bits[-1] > 0.0


def test_correctness_costs_log2_of_two_over_eps_cor() -> None:
    # Lim et al. 2014: the key length has the term -log2(2 / eps_cor) and eps_cor enters
    # nowhere else.
    eta = fibre_eta(20.0)
    strict = finite_decoy_bb84(eta, Y0, FiniteParams(eps_cor=1e-15), pulses=1e11)
    loose = finite_decoy_bb84(eta, Y0, FiniteParams(eps_cor=1e-5), pulses=1e11)
    assert loose.secret_bits - strict.secret_bits == pytest.approx(math.log2(1e10), abs=1.0)


def test_stricter_secrecy_gives_less_key() -> None:
    eta = fibre_eta(20.0)
    keys = [
        finite_decoy_bb84(eta, Y0, FiniteParams(eps_sec=eps), pulses=1e11).secret_bits
        for eps in (1e-3, 1e-6, 1e-10, 1e-15)
    ]
    assert keys == sorted(keys, reverse=True) and keys[-1] < keys[0]


@given(
    st.floats(min_value=-7.0, max_value=0.0).map(lambda x: 10.0**x),
    st.floats(min_value=0.0, max_value=1e-4),
    st.floats(min_value=6.0, max_value=18.0).map(lambda x: 10.0**x),
    st.floats(min_value=0.0, max_value=0.3),
    st.floats(min_value=0.0, max_value=0.05),
)
def test_estimates_never_beat_the_true_values(
    eta: float, y0: float, pulses: float, omega_share: float, e_d: float
) -> None:
    fp = FiniteParams(mu=0.5, nu=0.15, omega=0.15 * omega_share, misalignment=e_d)
    rate = finite_decoy_bb84(eta, y0, fp, pulses=pulses)
    share = pulses * fp.basis_probability**2
    tau0 = sum(p * poisson(k, 0) for k, p in zip(fp.intensities, fp.probabilities, strict=True))
    tau1 = sum(p * poisson(k, 1) for k, p in zip(fp.intensities, fp.probabilities, strict=True))
    y1 = 1.0 - (1.0 - y0) * (1.0 - eta)
    e1 = (y0 / 2 + e_d * (y1 - y0)) / y1 if y1 > 0 else e_d
    assert rate.vacuum_detections_lower <= share * tau0 * y0 * (1 + 1e-9) + 1e-9
    assert rate.single_photon_detections_lower <= share * tau1 * y1 * (1 + 1e-9) + 1e-9
    assert rate.phase_error_upper >= e1 * (1 - 1e-9) - 1e-12
    assert rate.key_per_pulse <= finite_decoy_bb84_limit(eta, y0, fp) + 1e-15


def test_rate_fields_agree() -> None:
    rate = finite_decoy_bb84(fibre_eta(10.0), Y0, FiniteParams(), pulses=1e12)
    assert rate.key_per_pulse == rate.secret_bits / 1e12
    assert rate.secret_bits == math.floor(rate.secret_bits)
    assert rate.ec_leak_bits == pytest.approx(
        1.16 * rate.key_basis_detections * binary_entropy(rate.qber), rel=1e-12
    )


# -- bad input -------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("fields", "message"),
    [
        ({"omega": -0.01}, r"^omega must be in \[0, nu\)"),
        ({"omega": 0.1}, r"^omega must be in \[0, nu\)"),
        ({"mu": 0.12, "nu": 0.1, "omega": 0.05}, r"^mu must be above nu \+ omega"),
        ({"mu": 11.0}, r"^mu must be above nu \+ omega .* at most 10"),
        ({"p_nu": 0.0}, r"^p_nu must be in \(0, 1\)"),
        ({"p_mu": 0.7}, r"^p_mu \+ p_nu \+ p_omega must be 1"),
        ({"basis_probability": 1.0}, r"^basis_probability must be in \(0, 1\)"),
        ({"misalignment": 0.7}, r"^misalignment must be in \[0, 0.5\], got 0.7$"),
        ({"ec_efficiency": 0.99}, r"^ec_efficiency must be a finite number >= 1"),
        ({"eps_sec": 0.0}, r"^eps_sec must be in \(0, 1\)"),
        ({"eps_cor": 1.0}, r"^eps_cor must be in \(0, 1\)"),
    ],
)
def test_params_refuse_bad_fields(fields: dict[str, float], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        FiniteParams(**fields)


@pytest.mark.parametrize("pulses", [0.0, -1.0, math.inf, math.nan])
def test_refuses_a_bad_block(pulses: float) -> None:
    with pytest.raises(ValueError, match=r"^pulses must be a positive finite number"):
        finite_decoy_bb84(0.01, Y0, FiniteParams(), pulses=pulses)


def test_refuses_a_bad_link() -> None:
    with pytest.raises(ValueError, match=r"^transmittance must be in \[0, 1\]"):
        finite_decoy_bb84(1.5, Y0, FiniteParams(), pulses=1e10)
    with pytest.raises(ValueError, match=r"^dark_yield must be in \[0, 1\]"):
        finite_decoy_bb84_limit(0.1, -1.0, FiniteParams())
