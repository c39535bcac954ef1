"""Gaussian-modulated coherent-state CV-QKD (GG02): secret key per symbol.

Reverse reconciliation, collective (Gaussian) attacks, asymptotic key, with the
detector's inefficiency and electronic noise trusted (Eve does not control them). The
protocol is Grosshans and Grangier, PRL 88, 057902 (2002); the trusted-noise key rate
Lodewyck et al., PRA 76, 042305 (2007); the formulas here follow the notation of
Laudenbach et al., "Continuous-variable quantum key distribution with Gaussian
modulation: the theory of practical implementations", Adv. Quantum Technol. 1, 1800011
(2018), also reviewed in Weedbrook et al., RMP 84, 621 (2012). Written from memory and
checked, in the tests, against the symplectic eigenvalues of the covariance matrices.

All variances in shot-noise units. With ``V = V_A + 1``, channel transmittance ``T``,
excess noise ``xi`` referred to the channel input, detector efficiency ``eta`` and
electronic noise ``v_el``:

* ``chi_line = 1/T - 1 + xi``; ``chi_det = (1 - eta + v_el) / eta`` for homodyne and
  ``(2 - eta + 2 v_el) / eta`` for heterodyne (one extra shot noise from splitting the
  signal to measure both quadratures, ``v_el`` in each of its two detectors);
  ``chi_tot = chi_line + chi_det / T``.
* Bob and Alice share ``I_AB = (d/2) log2((V + chi_tot) / (1 + chi_tot))``, ``d = 1`` for
  homodyne and 2 for heterodyne (both quadratures).
* Eve holds at most ``chi_BE = S(E) - S(E|b) = G((l1-1)/2) + G((l2-1)/2) - G((l3-1)/2) -
  G((l4-1)/2)`` bits, ``G(x) = (x+1) log2(x+1) - x log2 x``, with ``l1, l2`` the
  symplectic eigenvalues of Alice and Bob's state, ``l1,2^2 = (A +- sqrt(A^2 - 4B)) / 2``,
  ``A = V^2 (1 - 2T) + 2T + T^2 (V + chi_line)^2``, ``B = T^2 (V chi_line + 1)^2``, and
  ``l3, l4`` those of the state conditioned on Bob's measurement (a fifth is 1),
  ``l3,4^2 = (C +- sqrt(C^2 - 4D)) / 2``. Homodyne:
  ``C = [V sqrt(B) + T (V + chi_line) + A chi_det] / [T (V + chi_tot)]``,
  ``D = sqrt(B) (V + sqrt(B) chi_det) / [T (V + chi_tot)]``. Heterodyne:
  ``C = [A chi_det^2 + B + 1 + 2 chi_det (V sqrt(B) + T (V + chi_line)) + 2T (V^2 - 1)]
  / [T (V + chi_tot)]^2``, ``D = [(V + sqrt(B) chi_det) / (T (V + chi_tot))]^2``.
* Key per symbol ``K = beta I_AB - chi_BE``, clipped at zero.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

__all__ = ["CvParams", "CvRate", "Detection", "gg02", "holevo_g"]

#: Bob's measurement: one quadrature (homodyne) or both (heterodyne).
Detection = Literal["homodyne", "heterodyne"]
_DETECTIONS: tuple[str, ...] = ("homodyne", "heterodyne")


@dataclass(frozen=True, slots=True)
class CvParams:
    """Alice's modulation, the channel's excess noise and Bob's trusted detector.

    ``modulation_variance`` is ``V_A`` (shot-noise units, positive); ``excess_noise`` is
    ``xi`` at the channel input (>= 0); ``detector_efficiency`` is ``eta`` in (0, 1];
    ``electronic_noise`` is ``v_el`` (shot-noise units, >= 0); ``reconciliation_efficiency``
    is ``beta`` in (0, 1]; ``detection`` is ``"homodyne"`` or ``"heterodyne"``. Raises
    ValueError naming the field.
    """

    modulation_variance: float = 4.0
    excess_noise: float = 0.01
    detector_efficiency: float = 0.6
    electronic_noise: float = 0.01
    reconciliation_efficiency: float = 0.95
    detection: Detection = "homodyne"

    def __post_init__(self) -> None:
        if not (self.modulation_variance > 0.0 and math.isfinite(self.modulation_variance)):
            raise ValueError(
                "modulation_variance must be a positive finite number, "
                f"got {self.modulation_variance!r}"
            )
        for name in ("excess_noise", "electronic_noise"):
            value = getattr(self, name)
            if not (value >= 0.0 and math.isfinite(value)):
                raise ValueError(f"{name} must be a finite number >= 0, got {value!r}")
        for name in ("detector_efficiency", "reconciliation_efficiency"):
            value = getattr(self, name)
            if not 0.0 < value <= 1.0:
                raise ValueError(f"{name} must be in (0, 1], got {value!r}")
        if self.detection not in _DETECTIONS:
            raise ValueError(f"detection must be one of {_DETECTIONS}, got {self.detection!r}")


@dataclass(frozen=True, slots=True)
class CvRate:
    """Key per symbol and its two parts.

    ``key_per_symbol`` is ``max(0, beta I_AB - chi_BE)`` in bits per symbol (``positive``
    is False when it was clipped); ``mutual_information`` is ``I_AB`` and
    ``holevo_bound`` is ``chi_BE``, both in bits per symbol.
    """

    key_per_symbol: float
    mutual_information: float
    holevo_bound: float
    positive: bool


def holevo_g(x: float) -> float:
    """Return ``G(x) = (x+1) log2(x+1) - x log2 x``, the entropy in bits of a thermal
    state with mean photon number ``x >= 0`` (``G(0) = 0``). Raises ValueError naming it.
    """
    if not (x >= 0.0 and math.isfinite(x)):
        raise ValueError(f"x must be a finite number >= 0, got {x!r}")
    if x == 0.0:
        return 0.0
    return (x + 1.0) * math.log2(x + 1.0) - x * math.log2(x)


def _eigenvalue_entropy(trace: float, det: float) -> float:
    """Entropy of the two modes whose squared symplectic eigenvalues have sum ``trace``
    and product ``det`` (``l^2 = (trace +- sqrt(trace^2 - 4 det)) / 2``)."""
    big_sq = 0.5 * (trace + math.sqrt(max(0.0, trace * trace - 4.0 * det)))
    # The smaller root from the product, not the difference: no cancellation near 1.
    small_sq = det / big_sq
    total = 0.0
    for square in (big_sq, small_sq):
        # Rounding can take a pure mode's eigenvalue a hair below 1, where G is not defined.
        total += holevo_g(max(0.0, (math.sqrt(square) - 1.0) / 2.0))
    return total


def gg02(transmittance: float, params: CvParams) -> CvRate:
    """Return the key per symbol of GG02 over a channel of ``transmittance`` T.

    ``transmittance`` is the channel's only, in [0, 1]: the detector's efficiency and
    electronic noise are in ``params`` and trusted. T = 0 gives no key. Raises ValueError
    naming the parameter.
    """
    if not 0.0 <= transmittance <= 1.0:
        raise ValueError(f"transmittance must be in [0, 1], got {transmittance!r}")
    if transmittance == 0.0:
        return CvRate(key_per_symbol=0.0, mutual_information=0.0, holevo_bound=0.0, positive=False)
    t = transmittance
    v = params.modulation_variance + 1.0
    eta, v_el = params.detector_efficiency, params.electronic_noise
    homodyne = params.detection == "homodyne"
    chi_line = 1.0 / t - 1.0 + params.excess_noise
    chi_det = (1.0 - eta + v_el) / eta if homodyne else (2.0 - eta + 2.0 * v_el) / eta
    chi_tot = chi_line + chi_det / t
    quadratures = 1.0 if homodyne else 2.0
    # log1p of the signal-to-noise ratio rather than log2 of a quotient close to 1.
    i_ab = quadratures / 2.0 * math.log1p((v - 1.0) / (1.0 + chi_tot)) / math.log(2.0)

    a = v * v * (1.0 - 2.0 * t) + 2.0 * t + t * t * (v + chi_line) ** 2
    b = t * t * (v * chi_line + 1.0) ** 2
    sqrt_b = math.sqrt(b)
    norm = t * (v + chi_tot)
    if homodyne:
        c = (v * sqrt_b + t * (v + chi_line) + a * chi_det) / norm
        d = sqrt_b * (v + sqrt_b * chi_det) / norm
    else:
        c = (
            a * chi_det**2
            + b
            + 1.0
            + 2.0 * chi_det * (v * sqrt_b + t * (v + chi_line))
            + 2.0 * t * (v * v - 1.0)
        ) / norm**2
        d = ((v + sqrt_b * chi_det) / norm) ** 2
    # Near a pure state (T -> 1, no noise) the discriminant under the square root
    # cancels, so each entropy carries an error of about sqrt(machine epsilon) times
    # log2 of its inverse (~1e-7 bit); their difference can come out a hair below zero,
    # which the Holevo quantity never is.
    chi_be = max(0.0, _eigenvalue_entropy(a, b) - _eigenvalue_entropy(c, d))
    raw = params.reconciliation_efficiency * i_ab - chi_be
    return CvRate(
        key_per_symbol=max(0.0, raw),
        mutual_information=i_ab,
        holevo_bound=chi_be,
        positive=raw > 0.0,
    )
