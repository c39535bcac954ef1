"""Asymptotic decoy-state BB84 (``keystrata_physics.bb84``).

References:

* Ma, Qi, Zhao and Lo, PRA 72, 012326 (2005), with the fibre parameters they take from
  the GYS experiment (detector and receiver ``eta_Bob`` = 4.5 %, ``Y0`` = 1.7e-6, ``e_d``
  = 3.3 %, 0.21 dB/km, ``f`` = 1.22, ``mu`` of about 0.48): the key stays positive to
  about 142 km of fibre (from memory; /work/shared/physics.md says "to about 140 km" and
  "turns negative between 140 and 145 km"), with vacuum + weak decoys close to the
  infinite-decoy curve when ``nu`` is small, and an optimal ``mu`` of about 0.48.
* Lo, Ma and Chen, PRL 94, 230504 (2005): at low loss the key is linear in ``eta``,
  ``R ~ q eta [mu e^-mu (1 - h2(e_d)) - f mu h2(e_d)]`` for ``Y0 = 0`` (the GLLP formula
  with ``Q_mu ~ eta mu``, ``Y1 = eta``, ``e1 = E_mu = e_d``).
* Pirandola et al., Nat. Commun. 8, 15043 (2017): no rate above ``-log2(1 - eta)``.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy.optimize import minimize_scalar
from scipy.stats import entropy

from keystrata_physics.bb84 import (
    Bb84Params,
    Bb84Rate,
    DecoyMethod,
    decoy_bb84,
    gain,
    single_photon_error,
    single_photon_yield,
)
from keystrata_physics.bounds import plob_bits_per_use

# The GYS fibre link as Ma et al. 2005 use it (from memory, as physics.md quotes it).
GYS_ETA_BOB = 0.045
GYS_Y0 = 1.7e-6
GYS_DB_PER_KM = 0.21
GYS = Bb84Params(mu=0.48, nu=0.05, misalignment=0.033, ec_efficiency=1.22)


def gys_eta(km: float) -> float:
    return GYS_ETA_BOB * 10.0 ** (-GYS_DB_PER_KM * km / 10.0)


def gys(km: float, decoy: DecoyMethod, params: Bb84Params = GYS) -> Bb84Rate:
    return decoy_bb84(gys_eta(km), GYS_Y0, params, decoy=decoy)


def cutoff_km(positive_at: Callable[[float], bool]) -> float:
    """The distance where the key turns zero, by bisection between 50 and 300 km."""
    lo, hi = 50.0, 300.0
    assert positive_at(lo) and not positive_at(hi)
    while hi - lo > 1e-3:
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if positive_at(mid) else (lo, mid)
    return lo


def binary_entropy(p: float) -> float:
    return float(entropy([p, 1.0 - p], base=2))


# -- the published fibre check ---------------------------------------------------------


def test_infinite_decoy_key_turns_zero_near_142_km() -> None:
    km = cutoff_km(lambda d: gys(d, "infinite").positive)
    # Ma et al. 2005 (from memory): about 142 km; this model gives 142.0 km.
    assert 140.0 < km < 145.0
    assert km == pytest.approx(142.0, abs=1.0)


@pytest.mark.parametrize("nu", [0.01, 0.05])
def test_vacuum_and_weak_decoy_key_turns_zero_between_140_and_145_km(nu: float) -> None:
    params = Bb84Params(mu=0.48, nu=nu, misalignment=0.033, ec_efficiency=1.22)
    km = cutoff_km(lambda d: gys(d, "vacuum+weak", params).positive)
    # physics.md / Ma et al. 2005 (from memory): between 140 and 145 km; here 141.7 km at
    # nu = 0.01 and 140.6 km at nu = 0.05.
    assert 140.0 < km < 145.0


def test_a_weaker_decoy_comes_closer_to_infinite_decoys() -> None:
    # Ma et al. 2005: the vacuum + weak bounds tighten as nu -> 0 (from memory).
    infinite = cutoff_km(lambda d: gys(d, "infinite").positive)
    reach = [
        cutoff_km(lambda d, p=p: gys(d, "vacuum+weak", p).positive)
        for p in (Bb84Params(0.48, nu, 0.033, 1.22) for nu in (0.2, 0.1, 0.05, 0.01, 0.001))
    ]
    assert reach == sorted(reach)
    assert infinite - reach[-1] < 0.1
    assert all(r <= infinite for r in reach)


@pytest.mark.parametrize("km", [0.0, 20.0, 50.0, 80.0, 110.0, 130.0, 140.0, 141.0, 150.0])
def test_infinite_decoys_give_at_least_vacuum_and_weak(km: float) -> None:
    best, practical = gys(km, "infinite"), gys(km, "vacuum+weak")
    assert best.key_per_pulse >= practical.key_per_pulse >= 0.0
    assert practical.single_photon_yield_lower <= best.single_photon_yield_lower
    assert practical.single_photon_error_upper >= best.single_photon_error_upper


def test_optimal_signal_is_near_0_48() -> None:
    # Ma et al. 2005 (from memory, as physics.md quotes): mu of about 0.48 for GYS.
    found = minimize_scalar(
        lambda mu: -gys(50.0, "infinite", Bb84Params(mu, 0.01, 0.033, 1.22)).key_per_pulse,
        bounds=(0.05, 1.5),
        method="bounded",
    )
    assert 0.44 < found.x < 0.52


# -- the shape of the formula ----------------------------------------------------------


@pytest.mark.parametrize("decoy", ["infinite", "vacuum+weak"])
def test_key_at_low_loss_is_linear_in_eta(decoy: DecoyMethod) -> None:
    params = Bb84Params(mu=0.5, nu=0.01, misalignment=0.02, ec_efficiency=1.16)
    per_eta = [
        decoy_bb84(eta, 0.0, params, decoy=decoy).key_per_pulse / eta for eta in (1e-6, 1e-4)
    ]
    assert per_eta[0] == pytest.approx(per_eta[1], rel=1e-3)
    if decoy == "infinite":
        # Lo, Ma and Chen 2005: R ~ q eta [mu e^-mu (1 - h2(e_d)) - f mu h2(e_d)].
        e_d = params.misalignment
        slope = params.sifting * (
            params.mu * math.exp(-params.mu) * (1.0 - binary_entropy(e_d))
            - params.ec_efficiency * params.mu * binary_entropy(e_d)
        )
        assert per_eta[0] == pytest.approx(slope, rel=1e-5)


@given(
    st.floats(min_value=1e-9, max_value=1.0),
    st.floats(min_value=0.0, max_value=0.5),
    st.floats(min_value=0.05, max_value=2.0),
)
def test_qber_is_the_misalignment_without_dark_counts(eta: float, e_d: float, mu: float) -> None:
    params = Bb84Params(mu=mu, nu=mu / 4.0, misalignment=e_d)
    # Common practice: every detected signal photon is wrong with probability e_d.
    assert decoy_bb84(eta, 0.0, params).qber == pytest.approx(e_d, rel=1e-12, abs=1e-15)


def test_qber_mixes_dark_counts_as_random_bits() -> None:
    eta, y0 = 1e-4, 1e-5
    params = Bb84Params(mu=0.5, misalignment=0.02)
    signal = -math.expm1(-eta * 0.5) * (1.0 - y0)
    rate = decoy_bb84(eta, y0, params)
    # E Q = Y0 / 2 + e_d (Q - Y0) (Ma et al. 2005 with exact Poisson yields).
    assert rate.gain == pytest.approx(y0 + signal, rel=1e-12)
    assert rate.qber == pytest.approx((0.5 * y0 + 0.02 * signal) / (y0 + signal), rel=1e-12)


def test_no_light_gives_random_bits_and_no_key() -> None:
    rate = decoy_bb84(0.0, 1e-6, Bb84Params())
    assert rate.qber == 0.5
    assert rate.key_per_pulse == 0.0
    assert not rate.positive
    dark = decoy_bb84(0.0, 0.0, Bb84Params(misalignment=0.03))
    assert dark.gain == 0.0 and dark.key_per_pulse == 0.0 and not dark.positive


def test_key_is_clipped_at_zero_past_the_cutoff() -> None:
    for decoy in ("infinite", "vacuum+weak"):
        rate = gys(200.0, decoy)
        assert rate.key_per_pulse == 0.0 and not rate.positive


@given(
    st.floats(min_value=1e-8, max_value=1.0),
    st.floats(min_value=0.0, max_value=1e-3),
    st.floats(min_value=0.05, max_value=1.0),
    st.floats(min_value=0.01, max_value=0.9),
    st.floats(min_value=0.0, max_value=0.1),
)
def test_decoy_bounds_never_beat_the_true_values(
    eta: float, y0: float, mu: float, nu_share: float, e_d: float
) -> None:
    # Ma et al. 2005 derive Y1_L <= Y1 and e1_U >= e1 for any non-negative yields Y_n.
    params = Bb84Params(mu=mu, nu=mu * nu_share, misalignment=e_d)
    rate = decoy_bb84(eta, y0, params)
    assert rate.single_photon_yield_lower <= single_photon_yield(eta, y0) * (1 + 1e-9) + 1e-15
    assert rate.single_photon_error_upper >= single_photon_error(eta, y0, e_d) * (1 - 1e-9) - 1e-15


@given(
    st.floats(min_value=-8.0, max_value=math.log10(0.99)).map(lambda x: 10.0**x),
    st.floats(min_value=0.0, max_value=1e-3),
    st.floats(min_value=0.05, max_value=1.0),
    st.sampled_from(["infinite", "vacuum+weak"]),
)
def test_never_above_plob_of_the_total_transmittance(
    eta: float, y0: float, mu: float, decoy: DecoyMethod
) -> None:
    rate = decoy_bb84(eta, y0, Bb84Params(mu=mu, nu=mu / 5.0, sifting=1.0), decoy=decoy)
    assert rate.key_per_pulse <= plob_bits_per_use(eta)


def test_gain_of_the_vacuum_is_the_dark_yield() -> None:
    assert gain(0.3, 1e-6, 0.0) == 1e-6


# -- bad input -------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("fields", "message"),
    [
        ({"mu": 0.0}, r"^mu must be in \(0, 10\]"),
        ({"mu": 11.0}, r"^mu must be in \(0, 10\]"),
        ({"nu": -0.1}, r"^nu must be in \(0, 10\]"),
        ({"mu": 0.2, "nu": 0.3}, r"^nu must be below mu"),
        ({"misalignment": 0.7}, r"^misalignment must be in \[0, 0.5\], got 0.7$"),
        ({"ec_efficiency": 0.9}, r"^ec_efficiency must be a finite number >= 1"),
        ({"ec_efficiency": math.inf}, r"^ec_efficiency must be a finite number >= 1"),
        ({"sifting": 0.0}, r"^sifting must be in \(0, 1\]"),
        ({"mu": math.nan}, r"^mu must be"),
    ],
)
def test_params_refuse_bad_fields(fields: dict[str, float], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        Bb84Params(**fields)


@pytest.mark.parametrize(
    ("eta", "y0", "message"),
    [
        (-0.1, 0.0, r"^transmittance must be in \[0, 1\]"),
        (1.1, 0.0, r"^transmittance must be in \[0, 1\]"),
        (math.nan, 0.0, r"^transmittance must be in \[0, 1\]"),
        (0.1, -1e-9, r"^dark_yield must be in \[0, 1\]"),
        (0.1, 1.5, r"^dark_yield must be in \[0, 1\]"),
    ],
)
def test_decoy_bb84_refuses_a_bad_link(eta: float, y0: float, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        decoy_bb84(eta, y0, Bb84Params())


def test_decoy_bb84_refuses_an_unknown_decoy_method() -> None:
    with pytest.raises(ValueError, match=r"^decoy must be one of"):
        decoy_bb84(0.1, 0.0, Bb84Params(), decoy="two-weak")  # type: ignore[arg-type]
