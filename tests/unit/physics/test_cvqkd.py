"""GG02 CV-QKD with trusted detector noise (``keystrata_physics.cvqkd``).

References:

* The Holevo bound is recomputed by an independent route: the covariance matrices of the
  entanglement-based picture (Weedbrook et al., RMP 84, 621 (2012), sec. II and IV; the
  trusted detector as a beam splitter of transmittance ``eta`` fed by one half of an EPR
  state, Lodewyck et al., PRA 76, 042305 (2007)), Bob's homodyne or heterodyne
  conditioning of a Gaussian state (Weedbrook et al., sec. II.D), and symplectic
  eigenvalues from numpy.linalg (the moduli of the eigenvalues of ``i Omega gamma``).
* Sanity values from /work/shared/physics.md, "computed from the formulas, not
  published": homodyne, ``V_A`` = 4, ``xi`` = 0.01, ``eta`` = 0.6, ``v_el`` = 0.01,
  ``beta`` = 0.95 gives about 0.39, 0.092 and 0.023 bit per symbol at 1, 5 and 10 dB.
* The pure-loss channel (``xi`` = 0, ideal detector, ``beta`` = 1): Eve holds the whole
  purification, ``I_AB = (d/2) log2(1 + T V_A / d)`` (Grosshans and Grangier, PRL 88,
  057902 (2002) for homodyne, d = 1; heterodyne d = 2); the closed forms of Eve's
  entropies are derived in the docstrings below; for ``V_A`` -> infinity the homodyne
  key tends to ``(1/2) log2(1 / (1 - T))`` (from memory: half the PLOB bound).
* Pirandola et al., Nat. Commun. 8, 15043 (2017): no key above ``-log2(1 - T)``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import example, given
from hypothesis import strategies as st
from numpy.typing import NDArray

from keystrata_physics.bounds import plob_bits_per_use
from keystrata_physics.cvqkd import CvParams, Detection, gg02, holevo_g

Matrix = NDArray[np.float64]
I2 = np.eye(2)
Z2 = np.diag([1.0, -1.0])


def epr(v: float) -> Matrix:
    c = math.sqrt(v * v - 1.0)
    return np.block([[v * I2, c * Z2], [c * Z2, v * I2]])


def symplectic_eigenvalues(gamma: Matrix) -> list[float]:
    modes = gamma.shape[0] // 2
    omega = np.kron(np.eye(modes), np.array([[0.0, 1.0], [-1.0, 0.0]]))
    moduli = sorted(np.abs(np.linalg.eigvals(1j * omega @ gamma)))
    return [float(x) for x in moduli[::2]]  # they come in pairs +-nu


def thermal_entropy(nu: float) -> float:
    """Entropy in bits of a mode of symplectic eigenvalue ``nu`` (mean photons
    ``n = (nu - 1) / 2``), summed over its photon-number distribution ``n^k / (1+n)^(k+1)``
    rather than through the closed form."""
    n = max(0.0, (nu - 1.0) / 2.0)
    if n < 1e-12:
        return 0.0
    ratio = n / (1.0 + n)
    total, k, p = 0.0, 0, 1.0 / (1.0 + n)
    while p > 1e-300 and not (p < 1e-18 and k > n):
        total -= p * math.log2(p)
        p *= ratio
        k += 1
    return total


def entropy_of(gamma: Matrix) -> float:
    return sum(thermal_entropy(nu) for nu in symplectic_eigenvalues(gamma))


def reference(t: float, p: CvParams) -> tuple[float, float, list[float]]:
    """``(I_AB, chi_BE, eigenvalues of the conditional state)`` from covariance matrices."""
    v = p.modulation_variance + 1.0
    eta, v_el = p.detector_efficiency, p.electronic_noise
    homodyne = p.detection == "homodyne"
    chi_line = 1.0 / t - 1.0 + p.excess_noise
    c = math.sqrt(t * (v * v - 1.0))
    gamma_ab = np.block([[v * I2, c * Z2], [c * Z2, t * (v + chi_line) * I2]])
    # The detector's noise mode: (1 - eta) v_noise = 1 - eta + v_el for homodyne, and one
    # electronic noise in each of the heterodyne's two detectors.
    extra = v_el if homodyne else 2.0 * v_el
    v_noise = 1.0 + extra / (1.0 - eta) if eta < 1.0 else 1.0
    full = np.zeros((8, 8))  # modes A, B, F0, G
    full[:4, :4] = gamma_ab
    full[4:, 4:] = epr(v_noise)
    s, r = math.sqrt(eta), math.sqrt(1.0 - eta)
    splitter = np.eye(8)
    splitter[2:6, 2:6] = np.block([[s * I2, r * I2], [-r * I2, s * I2]])
    full = splitter @ full @ splitter.T
    rest, measured = [0, 1, 4, 5, 6, 7], [2, 3]  # A, F, G | B after the splitter
    g_r = full[np.ix_(rest, rest)]
    g_b = full[np.ix_(measured, measured)]
    cross = full[np.ix_(rest, measured)]
    if homodyne:
        conditional = g_r - cross @ np.diag([1.0, 0.0]) @ cross.T / g_b[0, 0]
        var_y, cov = g_b[0, 0], full[0, 2]
        # Alice's value is her heterodyne outcome on A: variance (V + 1) / 2, covariance
        # with y of cov / sqrt(2); its ratio cov^2 / (V + 1) is what y loses given it.
        i_ab = 0.5 * math.log2(var_y / (var_y - cov**2 / (v + 1.0)))
    else:
        conditional = g_r - cross @ np.linalg.inv(g_b + I2) @ cross.T
        var_y, cov = (g_b[0, 0] + 1.0) / 2.0, full[0, 2] / 2.0
        i_ab = math.log2(var_y / (var_y - cov**2 / ((v + 1.0) / 2.0)))
    chi_be = entropy_of(gamma_ab) - entropy_of(conditional)
    return i_ab, chi_be, symplectic_eigenvalues(conditional)


def params(detection: Detection = "homodyne", **fields: float) -> CvParams:
    return CvParams(detection=detection, **fields)  # type: ignore[arg-type]


def test_holevo_g_is_the_thermal_entropy() -> None:
    for x in (0.0, 1e-6, 0.3, 1.0, 7.5, 40.0):
        assert holevo_g(x) == pytest.approx(thermal_entropy(2.0 * x + 1.0), rel=1e-9, abs=1e-12)


@pytest.mark.parametrize(("db", "expected"), [(1.0, 0.39), (5.0, 0.092), (10.0, 0.023)])
def test_physics_sheet_sanity_values(db: float, expected: float) -> None:
    rate = gg02(10.0 ** (-db / 10.0), CvParams())
    digits = len(str(expected).split(".")[1])
    assert round(rate.key_per_symbol, digits) == expected
    assert rate.positive


@pytest.mark.parametrize("detection", ["homodyne", "heterodyne"])
@pytest.mark.parametrize("t", [0.95, 0.5, 0.1, 0.01])
@pytest.mark.parametrize(
    ("v_a", "xi", "eta", "v_el"),
    [(4.0, 0.01, 0.6, 0.01), (10.0, 0.05, 0.8, 0.1), (2.0, 0.0, 0.5, 0.0), (30.0, 0.02, 1.0, 0.0)],
)
def test_holevo_bound_matches_symplectic_eigenvalues(
    detection: Detection, t: float, v_a: float, xi: float, eta: float, v_el: float
) -> None:
    p = params(
        detection,
        modulation_variance=v_a,
        excess_noise=xi,
        detector_efficiency=eta,
        electronic_noise=v_el,
    )
    rate = gg02(t, p)
    i_ab, chi_be, conditional = reference(t, p)
    assert rate.mutual_information == pytest.approx(i_ab, rel=1e-9, abs=1e-12)
    assert rate.holevo_bound == pytest.approx(chi_be, rel=1e-7, abs=1e-9)
    assert min(conditional) == pytest.approx(1.0, abs=1e-6)  # lambda_5 = 1


@given(
    st.sampled_from(["homodyne", "heterodyne"]),
    st.floats(min_value=1e-3, max_value=1.0),
    st.floats(min_value=0.1, max_value=50.0),
    st.floats(min_value=0.0, max_value=0.2),
    st.floats(min_value=0.2, max_value=0.99),
    st.floats(min_value=0.0, max_value=0.3),
)
@example("homodyne", 1.0 - 1e-16, 0.5, 0.0, 0.5, 0.0)  # a near-pure state hypothesis found
def test_holevo_bound_matches_symplectic_eigenvalues_everywhere(
    detection: Detection, t: float, v_a: float, xi: float, eta: float, v_el: float
) -> None:
    p = params(
        detection,
        modulation_variance=v_a,
        excess_noise=xi,
        detector_efficiency=eta,
        electronic_noise=v_el,
    )
    i_ab, chi_be, _ = reference(t, p)
    rate = gg02(t, p)
    assert rate.mutual_information == pytest.approx(i_ab, rel=1e-8, abs=1e-11)
    # Near a pure state (T -> 1, xi = 0) the symplectic eigenvalues come from a square
    # root of a cancelling discriminant in both computations: about 1e-7 bit of absolute
    # error is the conditioning of the problem (hypothesis found T = 1 - 1e-16, chi
    # -7.5e-8 against 0.0), not a difference of the formula.
    assert rate.holevo_bound == pytest.approx(chi_be, rel=1e-6, abs=1e-6)
    assert rate.holevo_bound >= 0.0


def pure_loss(detection: Detection, v_a: float) -> CvParams:
    return params(
        detection,
        modulation_variance=v_a,
        excess_noise=0.0,
        detector_efficiency=1.0,
        electronic_noise=0.0,
        reconciliation_efficiency=1.0,
    )


@pytest.mark.parametrize("t", [0.9, 0.5, 0.1, 1e-3])
@pytest.mark.parametrize("v_a", [1.0, 4.0, 100.0])
def test_pure_loss_homodyne_closed_form(t: float, v_a: float) -> None:
    """Eve's beam splitter with a vacuum input purifies everything: S(E) is one mode of
    variance ``(1 - T) V + T``; given Bob's x, Alice's mode has variances
    ``V ((1 - T) V + T) / (T (V - 1) + 1)`` and ``V``, one symplectic eigenvalue."""
    v = v_a + 1.0
    l1 = (1.0 - t) * v + t
    l3 = math.sqrt(v * l1 / (t * (v - 1.0) + 1.0))
    expected = 0.5 * math.log2(1.0 + t * v_a) - holevo_g((l1 - 1) / 2) + holevo_g((l3 - 1) / 2)
    rate = gg02(t, pure_loss("homodyne", v_a))
    assert rate.mutual_information == pytest.approx(0.5 * math.log2(1.0 + t * v_a), rel=1e-12)
    assert rate.key_per_symbol == pytest.approx(expected, rel=1e-9, abs=1e-12)


@pytest.mark.parametrize("t", [0.9, 0.5, 0.1, 1e-3])
@pytest.mark.parametrize("v_a", [1.0, 4.0, 100.0])
def test_pure_loss_heterodyne_closed_form(t: float, v_a: float) -> None:
    """As above; given Bob's heterodyne outcome, Alice's mode has variance
    ``V - T (V^2 - 1) / (T (V - 1) + 2)`` in both quadratures."""
    v = v_a + 1.0
    l1 = (1.0 - t) * v + t
    l3 = v - t * (v * v - 1.0) / (t * (v - 1.0) + 2.0)
    i_ab = math.log2(1.0 + t * v_a / 2.0)
    expected = i_ab - holevo_g((l1 - 1) / 2) + holevo_g((l3 - 1) / 2)
    rate = gg02(t, pure_loss("heterodyne", v_a))
    assert rate.mutual_information == pytest.approx(i_ab, rel=1e-12)
    assert rate.key_per_symbol == pytest.approx(expected, rel=1e-9, abs=1e-12)


@pytest.mark.parametrize("t", [0.9, 0.5, 0.1, 0.01])
def test_pure_loss_at_large_modulation(t: float) -> None:
    # Homodyne: (1/2) log2(1 / (1 - T)), from memory. Heterodyne: -log2(1 - T) / T - log2 e,
    # the V -> infinity limit of the closed form above (G(x) ~ log2(e x) for large x).
    hom = gg02(t, pure_loss("homodyne", 1e7)).key_per_symbol
    het = gg02(t, pure_loss("heterodyne", 1e7)).key_per_symbol
    assert hom == pytest.approx(-0.5 * math.log2(1.0 - t), rel=1e-4)
    assert het == pytest.approx(-math.log2(1.0 - t) / t - math.log2(math.e), rel=1e-4)


@given(
    st.sampled_from(["homodyne", "heterodyne"]),
    st.floats(min_value=-8.0, max_value=math.log10(0.99)).map(lambda x: 10.0**x),
    st.floats(min_value=0.01, max_value=1e4),
    st.floats(min_value=0.0, max_value=0.5),
    st.floats(min_value=0.05, max_value=1.0),
    st.floats(min_value=0.0, max_value=0.5),
    st.floats(min_value=0.5, max_value=1.0),
)
def test_never_above_plob(
    detection: Detection, t: float, v_a: float, xi: float, eta: float, v_el: float, beta: float
) -> None:
    p = params(
        detection,
        modulation_variance=v_a,
        excess_noise=xi,
        detector_efficiency=eta,
        electronic_noise=v_el,
        reconciliation_efficiency=beta,
    )
    rate = gg02(t, p)
    assert 0.0 <= rate.key_per_symbol <= plob_bits_per_use(t)


def test_excess_noise_takes_the_key() -> None:
    t = 10.0 ** (-0.5)
    keys = [gg02(t, CvParams(excess_noise=xi)).key_per_symbol for xi in (0.0, 0.02, 0.05, 0.1)]
    assert keys == sorted(keys, reverse=True)
    noisy = gg02(t, CvParams(excess_noise=0.5))
    assert noisy.key_per_symbol == 0.0 and not noisy.positive
    assert noisy.mutual_information > 0.0 and noisy.holevo_bound > 0.0


def test_no_channel_gives_no_key() -> None:
    rate = gg02(0.0, CvParams())
    assert rate == type(rate)(0.0, 0.0, 0.0, False)


@pytest.mark.parametrize(
    ("fields", "message"),
    [
        ({"modulation_variance": 0.0}, r"^modulation_variance must be a positive finite number"),
        ({"modulation_variance": math.inf}, r"^modulation_variance must be"),
        ({"excess_noise": -0.01}, r"^excess_noise must be a finite number >= 0"),
        ({"electronic_noise": math.nan}, r"^electronic_noise must be a finite number >= 0"),
        ({"detector_efficiency": 0.0}, r"^detector_efficiency must be in \(0, 1\]"),
        ({"reconciliation_efficiency": 1.2}, r"^reconciliation_efficiency must be in \(0, 1\]"),
    ],
)
def test_params_refuse_bad_fields(fields: dict[str, float], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        CvParams(**fields)


def test_params_refuse_an_unknown_detection() -> None:
    with pytest.raises(ValueError, match=r"^detection must be one of"):
        CvParams(detection="photon-counting")  # type: ignore[arg-type]


@pytest.mark.parametrize("t", [-0.1, 1.01, math.nan])
def test_gg02_refuses_a_bad_transmittance(t: float) -> None:
    with pytest.raises(ValueError, match=r"^transmittance must be in \[0, 1\]"):
        gg02(t, CvParams())


def test_holevo_g_refuses_a_negative_argument() -> None:
    with pytest.raises(ValueError, match=r"^x must be a finite number >= 0"):
        holevo_g(-0.5)
