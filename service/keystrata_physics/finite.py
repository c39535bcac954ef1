"""Finite-key decoy BB84: the key a block of ``N`` pulses gives, after Lim et al. 2014.

Lim, Curty, Walenta, Xu and Zbinden, "Concise security bounds for practical decoy-state
quantum key distribution", PRA 89, 022307 (2014), two-decoy version. Written from memory
of that paper, not with it at hand; every formula is listed here so it can be checked.

Protocol. Alice sends ``N`` pulses of intensity ``k`` in ``{mu1, mu2, mu3}`` (``mu1 > mu2
+ mu3``, ``mu2 > mu3 >= 0``; ``mu``, ``nu`` and ``omega`` in :class:`FiniteParams`) with
probabilities ``p_k``; Alice and Bob each choose the key basis X with probability ``q_x``
(the test basis Z otherwise). Key comes from the X-basis
detections of all intensities; the Z-basis ones estimate the phase error. ``n_{X,k}`` and
``m_{X,k}`` are the X detections and errors at intensity ``k``, ``n_X`` and ``m_X`` their
sums, likewise for Z. This module computes them as the expected values of the link model
in :mod:`keystrata_physics.bb84` (``N p_k q_x^2 Q_k`` and ``N p_k q_x^2 E_k Q_k``).

Bounds, with ``tau_n = sum_k p_k e^-k k^n / n!`` (the chance that a pulse has ``n``
photons) and, for the secrecy ``eps_sec``, the Hoeffding deviation
``delta(n) = sqrt(n / 2 ln(21 / eps_sec))``:

* ``n^+-_{X,k} = e^k / p_k (n_{X,k} +- delta(n_X))``, ``m^+-_{Z,k}`` likewise with ``m_Z``;
* vacuum events ``s_{X,0} >= tau_0 (mu2 n^-_{X,mu3} - mu3 n^+_{X,mu2}) / (mu2 - mu3)``;
* single-photon events ``s_{X,1} >= tau_1 mu1 [n^-_{X,mu2} - n^+_{X,mu3} - (mu2^2 - mu3^2)
  / mu1^2 (n^+_{X,mu1} - s_{X,0} / tau_0)] / [mu1 (mu2 - mu3) - mu2^2 + mu3^2]``, and
  ``s_{Z,1}`` the same from Z counts;
* single-photon errors in Z, ``v_{Z,1} <= tau_1 (m^+_{Z,mu2} - m^-_{Z,mu3}) / (mu2 - mu3)``;
* phase error ``phi_X <= v_{Z,1} / s_{Z,1} + gamma(eps_sec / 21, v_{Z,1} / s_{Z,1}, s_{Z,1},
  s_{X,1})``, ``gamma(a, b, c, d) = sqrt((c + d)(1 - b) b / (c d ln 2) log2((c + d) /
  (c d (1 - b) b a^2)))`` (a random-sampling bound without replacement);
* key length ``l = floor(s_{X,0} + s_{X,1} [1 - h2(phi_X)] - lambda_EC - 6 log2(21 /
  eps_sec) - log2(2 / eps_cor))``, with error correction leaking ``lambda_EC = f n_X
  h2(E_X)``, ``E_X = m_X / n_X``.

The 21 counts the failure probabilities the secrecy is split into in the two-decoy
analysis (from memory; Rusca et al.'s one-decoy analysis, APL 112, 171104 (2018), has 19
in the same places). As ``N`` grows the deviations vanish and the bounds become Ma et al.'s
vacuum + weak decoy bounds (for ``mu3 = 0``), so the key per pulse tends to
:func:`finite_decoy_bb84_limit`, the same protocol without the finite-size terms.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from keystrata_physics.bb84 import MAX_MEAN_PHOTON_NUMBER, check_link, error_gain, gain
from keystrata_physics.entropy import h2

__all__ = ["FiniteParams", "FiniteRate", "finite_decoy_bb84", "finite_decoy_bb84_limit"]

#: How many parts the secrecy parameter is split into (Lim et al. 2014, from memory).
EPS_SPLIT = 21


@dataclass(frozen=True, slots=True)
class FiniteParams:
    """Intensities, their probabilities and the security parameters of finite-key BB84.

    ``mu``, ``nu`` and ``omega`` are the mean photon numbers of the signal, the decoy and
    the weakest decoy (``mu1``, ``mu2``, ``mu3`` in Lim et al.; ``omega = 0`` is the
    vacuum) with ``mu > nu + omega`` and ``nu > omega >= 0``; ``p_mu``, ``p_nu`` and
    ``p_omega`` their chances, each in (0, 1), summing to 1; ``basis_probability`` is
    ``q_x``, the chance that Alice (and Bob) choose the key basis, in (0, 1);
    ``misalignment`` is ``e_d`` in [0, 0.5]; ``ec_efficiency`` is ``f >= 1``; ``eps_sec``
    and ``eps_cor`` the secrecy and correctness parameters in (0, 1). Raises ValueError
    naming the field.
    """

    mu: float = 0.5
    nu: float = 0.1
    omega: float = 0.0
    p_mu: float = 0.8
    p_nu: float = 0.15
    p_omega: float = 0.05
    basis_probability: float = 0.9
    misalignment: float = 0.01
    ec_efficiency: float = 1.16
    eps_sec: float = 1e-10
    eps_cor: float = 1e-15

    def __post_init__(self) -> None:
        if not 0.0 <= self.omega < self.nu:
            raise ValueError(f"omega must be in [0, nu) with nu {self.nu!r}, got {self.omega!r}")
        if not (self.mu > self.nu + self.omega and self.mu <= MAX_MEAN_PHOTON_NUMBER):
            raise ValueError(
                f"mu must be above nu + omega ({self.nu + self.omega!r}) and at most"
                f" {MAX_MEAN_PHOTON_NUMBER:g}, got {self.mu!r}"
            )
        for name in ("p_mu", "p_nu", "p_omega"):
            value = getattr(self, name)
            if not 0.0 < value < 1.0:
                raise ValueError(f"{name} must be in (0, 1), got {value!r}")
        total = math.fsum(self.probabilities)
        if abs(total - 1.0) > 1e-9:
            raise ValueError(f"p_mu + p_nu + p_omega must be 1, got {total!r}")
        if not 0.0 < self.basis_probability < 1.0:
            raise ValueError(f"basis_probability must be in (0, 1), got {self.basis_probability!r}")
        if not 0.0 <= self.misalignment <= 0.5:
            raise ValueError(f"misalignment must be in [0, 0.5], got {self.misalignment!r}")
        if not (self.ec_efficiency >= 1.0 and math.isfinite(self.ec_efficiency)):
            raise ValueError(
                f"ec_efficiency must be a finite number >= 1, got {self.ec_efficiency!r}"
            )
        for name in ("eps_sec", "eps_cor"):
            eps = getattr(self, name)
            if not 0.0 < eps < 1.0:
                raise ValueError(f"{name} must be in (0, 1), got {eps!r}")

    @property
    def intensities(self) -> tuple[float, float, float]:
        """``(mu, nu, omega)``."""
        return (self.mu, self.nu, self.omega)

    @property
    def probabilities(self) -> tuple[float, float, float]:
        """``(p_mu, p_nu, p_omega)``."""
        return (self.p_mu, self.p_nu, self.p_omega)


@dataclass(frozen=True, slots=True)
class FiniteRate:
    """The key of one block and the estimates it came from.

    ``key_per_pulse`` is ``secret_bits / pulses``; ``secret_bits`` the key length ``l``
    (never negative: ``positive`` is False when the formula gave zero or less); ``qber``
    is ``E_X``, the key basis's error rate; ``key_basis_detections`` is ``n_X``;
    ``vacuum_detections_lower`` and ``single_photon_detections_lower`` are ``s_{X,0}`` and
    ``s_{X,1}``; ``phase_error_upper`` is ``phi_X``; ``ec_leak_bits`` is ``lambda_EC``.
    """

    key_per_pulse: float
    secret_bits: float
    qber: float
    positive: bool
    key_basis_detections: float
    vacuum_detections_lower: float
    single_photon_detections_lower: float
    phase_error_upper: float
    ec_leak_bits: float


@dataclass(frozen=True, slots=True)
class _Estimate:
    n_x: float
    e_x: float
    s_x0: float
    s_x1: float
    phi_x: float
    leak: float
    length: float


def _gamma(a: float, b: float, c: float, d: float) -> float:
    """Lim et al.'s sampling correction of the phase error (0 when ``b`` is 0 or 1)."""
    spread = (1.0 - b) * b
    if spread <= 0.0:
        return 0.0
    inner = math.log2((c + d) / (c * d * spread * a * a))
    return math.sqrt(max(0.0, (c + d) * spread / (c * d * math.log(2.0)) * inner))


def _estimate(
    transmittance: float, dark_yield: float, params: FiniteParams, pulses: float | None
) -> _Estimate:
    """The bounds and key length of a block of ``pulses``; per pulse, without the
    finite-size terms, when ``pulses`` is None."""
    mu = params.intensities
    p = params.probabilities
    finite = pulses is not None
    scale = pulses if pulses is not None else 1.0
    log_term = math.log(EPS_SPLIT / params.eps_sec)

    def delta(total: float) -> float:
        return math.sqrt(total / 2.0 * log_term) if finite else 0.0

    tau0 = math.fsum(pk * math.exp(-k) for k, pk in zip(mu, p, strict=True))
    tau1 = math.fsum(pk * math.exp(-k) * k for k, pk in zip(mu, p, strict=True))
    gains = [gain(transmittance, dark_yield, k) for k in mu]
    errors = [error_gain(transmittance, dark_yield, k, params.misalignment) for k in mu]

    def bounds(
        basis_share: float, counts_of: list[float]
    ) -> tuple[list[float], list[float], float]:
        counts = [scale * pk * basis_share * c for pk, c in zip(p, counts_of, strict=True)]
        d = delta(math.fsum(counts))
        lower = [math.exp(k) / pk * (c - d) for k, pk, c in zip(mu, p, counts, strict=True)]
        upper = [math.exp(k) / pk * (c + d) for k, pk, c in zip(mu, p, counts, strict=True)]
        return lower, upper, math.fsum(counts)

    def vacuum_and_single(lo: list[float], up: list[float]) -> tuple[float, float]:
        s0 = max(0.0, tau0 * (mu[1] * lo[2] - mu[2] * up[1]) / (mu[1] - mu[2]))
        ratio = (mu[1] ** 2 - mu[2] ** 2) / mu[0] ** 2
        denominator = mu[0] * (mu[1] - mu[2]) - mu[1] ** 2 + mu[2] ** 2
        s1 = tau1 * mu[0] * (lo[1] - up[2] - ratio * (up[0] - s0 / tau0)) / denominator
        return s0, max(0.0, s1)

    share_x = params.basis_probability**2
    share_z = (1.0 - params.basis_probability) ** 2
    nx_lo, nx_up, n_x = bounds(share_x, gains)
    nz_lo, nz_up, _ = bounds(share_z, gains)
    mz_lo, mz_up, _ = bounds(share_z, errors)
    m_x = math.fsum(scale * pk * share_x * e for pk, e in zip(p, errors, strict=True))
    s_x0, s_x1 = vacuum_and_single(nx_lo, nx_up)
    _, s_z1 = vacuum_and_single(nz_lo, nz_up)
    v_z1 = max(0.0, tau1 * (mz_up[1] - mz_lo[2]) / (mu[1] - mu[2]))

    if s_x1 > 0.0 and s_z1 > 0.0:
        z_error = min(0.5, v_z1 / s_z1)
        correction = _gamma(params.eps_sec / EPS_SPLIT, z_error, s_z1, s_x1) if finite else 0.0
        phi_x = min(0.5, z_error + correction)
    else:
        phi_x = 0.5
    # With no detection at all the error rate is 0/0; its limit for a faint signal is e_d.
    e_x = min(0.5, m_x / n_x) if n_x > 0.0 else params.misalignment
    leak = params.ec_efficiency * n_x * h2(e_x)
    overhead = (
        6.0 * math.log2(EPS_SPLIT / params.eps_sec) + math.log2(2.0 / params.eps_cor)
        if finite
        else 0.0
    )
    length = s_x0 + s_x1 * (1.0 - h2(phi_x)) - leak - overhead
    return _Estimate(n_x, e_x, s_x0, s_x1, phi_x, leak, length)


def finite_decoy_bb84(
    transmittance: float, dark_yield: float, params: FiniteParams, *, pulses: float
) -> FiniteRate:
    """Return the secret key of a block of ``pulses`` pulses (Lim et al. 2014).

    ``transmittance`` is the total ``eta`` in [0, 1] (channel x receiver x detector) and
    ``dark_yield`` is ``Y0`` in [0, 1], as for :func:`keystrata_physics.bb84.decoy_bb84`;
    ``pulses`` is ``N``, a positive finite number. The detections are the link model's
    expected counts. Raises ValueError naming the parameter.
    """
    check_link(transmittance, dark_yield)
    if not (pulses > 0.0 and math.isfinite(pulses)):
        raise ValueError(f"pulses must be a positive finite number, got {pulses!r}")
    est = _estimate(transmittance, dark_yield, params, pulses)
    bits = float(math.floor(est.length)) if est.length > 0.0 else 0.0
    return FiniteRate(
        key_per_pulse=bits / pulses,
        secret_bits=bits,
        qber=est.e_x,
        positive=bits > 0.0,
        key_basis_detections=est.n_x,
        vacuum_detections_lower=est.s_x0,
        single_photon_detections_lower=est.s_x1,
        phase_error_upper=est.phi_x,
        ec_leak_bits=est.leak,
    )


def finite_decoy_bb84_limit(transmittance: float, dark_yield: float, params: FiniteParams) -> float:
    """Return the key per pulse of the same protocol for infinitely long blocks.

    The bounds above without deviations, sampling correction or the ``eps`` terms:
    ``q_x^2 {tau_0 Y0_L + tau_1 Y1_L [1 - h2(e1_U)] - f Q_X h2(E_X)}`` per pulse, with
    ``Q_X`` the gain averaged over the intensities. Never negative. Raises ValueError
    naming the parameter.
    """
    check_link(transmittance, dark_yield)
    return max(0.0, _estimate(transmittance, dark_yield, params, None).length)
