"""Decoy-state BB84 with weak coherent pulses: the asymptotic secret key per pulse.

Sources, step by step:

* The key rate is the GLLP formula (Gottesman, Lo, Luetkenhaus and Preskill, "Security
  of quantum key distribution with imperfect devices", QIC 4, 325 (2004)) in the decoy
  form of Lo, Ma and Chen, "Decoy state quantum key distribution", PRL 94, 230504 (2005):
  ``R = q { Q1 [1 - h2(e1)] - f Q_mu h2(E_mu) }``, with ``q`` the sifting factor, ``Q1``
  the gain and ``e1`` the error rate of single-photon pulses, ``Q_mu`` and ``E_mu`` the
  gain and QBER of the signal and ``f`` the error-correction inefficiency.
* Without decoy data ``Y1`` and ``e1`` would be unknown; Lo, Ma and Chen show that
  infinitely many decoy intensities measure them exactly (``decoy="infinite"``).
* With one weak decoy ``nu`` and the vacuum (``decoy="vacuum+weak"``) they are bounded
  from the measured gains and errors (Ma, Qi, Zhao and Lo, "Practical decoy state for
  quantum key distribution", PRA 72, 012326 (2005)):
  ``Y1_L = mu / (mu nu - nu^2) [Q_nu e^nu - Q_mu e^mu nu^2 / mu^2 - (mu^2 - nu^2) / mu^2 Y0]``
  and ``e1_U = (E_nu Q_nu e^nu - e0 Y0) / (Y1_L nu)``, ``e0 = 1/2``. These hold for any
  non-negative photon-number yields ``Y_n``, so they never exceed the true ``Y1`` nor
  fall below the true ``e1``.

The link is the usual model of those papers: Poisson photon numbers, each photon
detected independently with the total transmittance ``eta`` (channel x receiver optics x
detector efficiency), and a click without signal with probability ``Y0`` (dark counts,
background and afterpulsing, combined by the caller). Here the yields are the exact
``Y_n = 1 - (1 - Y0)(1 - eta)^n``, so ``Q_mu = 1 - (1 - Y0) exp(-eta mu)``; Ma et al.
write ``Y_n ~ Y0 + eta_n`` and ``Q_mu ~ Y0 + 1 - exp(-eta mu)``, which differ by terms of
order ``Y0 eta`` (below 1e-6 relative on real links). A click from a dark count is a
random bit (error 1/2); a click from signal is wrong with the misalignment ``e_d``:
``E_mu Q_mu = e0 Y0 + e_d (Q_mu - Y0)``, so with ``Y0 = 0`` the QBER is ``e_d``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

from keystrata_physics.entropy import h2

__all__ = [
    "Bb84Params",
    "Bb84Rate",
    "DecoyMethod",
    "check_link",
    "decoy_bb84",
    "error_gain",
    "gain",
    "single_photon_error",
    "single_photon_yield",
]

#: How the single-photon yield and error are found: Ma et al.'s vacuum + weak decoy
#: bounds, or their true values (infinitely many decoys, Lo, Ma and Chen 2005).
DecoyMethod = Literal["vacuum+weak", "infinite"]
_DECOY_METHODS: tuple[str, ...] = ("vacuum+weak", "infinite")

#: Error rate of a click that carries no signal: a random bit.
_E0 = 0.5

#: The largest mean photon number accepted; BB84 sources run well below one.
MAX_MEAN_PHOTON_NUMBER = 10.0


def check_link(transmittance: float, dark_yield: float) -> None:
    """Raise ValueError unless ``transmittance`` and ``dark_yield`` are in [0, 1]."""
    if not 0.0 <= transmittance <= 1.0:
        raise ValueError(f"transmittance must be in [0, 1], got {transmittance!r}")
    if not 0.0 <= dark_yield <= 1.0:
        raise ValueError(f"dark_yield must be in [0, 1], got {dark_yield!r}")


def _check_intensity(name: str, value: float, *, allow_zero: bool = False) -> None:
    low_ok = value >= 0.0 if allow_zero else value > 0.0
    if not (low_ok and value <= MAX_MEAN_PHOTON_NUMBER):
        bracket = "[0" if allow_zero else "(0"
        raise ValueError(f"{name} must be in {bracket}, {MAX_MEAN_PHOTON_NUMBER:g}], got {value!r}")


def _check_misalignment(value: float) -> None:
    if not 0.0 <= value <= 0.5:
        raise ValueError(f"misalignment must be in [0, 0.5], got {value!r}")


def _check_ec_efficiency(value: float) -> None:
    if not (value >= 1.0 and math.isfinite(value)):
        raise ValueError(f"ec_efficiency must be a finite number >= 1, got {value!r}")


@dataclass(frozen=True, slots=True)
class Bb84Params:
    """Source and post-processing of decoy-state BB84.

    ``mu`` is the signal's mean photon number and ``nu`` the weak decoy's (``0 < nu <
    mu``; only ``"vacuum+weak"`` uses it); ``misalignment`` is ``e_d``, the chance that a
    detected signal photon gives the wrong bit; ``ec_efficiency`` is ``f >= 1``, error
    correction's leakage over the Shannon limit; ``sifting`` is ``q``, the fraction of
    detections kept for key (1/2 for standard BB84). Raises ValueError naming the field.
    """

    mu: float = 0.5
    nu: float = 0.1
    misalignment: float = 0.01
    ec_efficiency: float = 1.16
    sifting: float = 0.5

    def __post_init__(self) -> None:
        _check_intensity("mu", self.mu)
        _check_intensity("nu", self.nu)
        if not self.nu < self.mu:
            raise ValueError(f"nu must be below mu ({self.mu!r}), got {self.nu!r}")
        _check_misalignment(self.misalignment)
        _check_ec_efficiency(self.ec_efficiency)
        if not 0.0 < self.sifting <= 1.0:
            raise ValueError(f"sifting must be in (0, 1], got {self.sifting!r}")


@dataclass(frozen=True, slots=True)
class Bb84Rate:
    """The asymptotic key of decoy BB84 and the quantities it came from.

    ``key_per_pulse`` is secret bits per pulse sent, never negative (``positive`` is False
    when the formula gave zero or less); ``qber`` is ``E_mu`` and ``gain`` is ``Q_mu``, of
    the signal; ``single_photon_yield_lower`` and ``single_photon_error_upper`` are the
    ``Y1`` and ``e1`` the key was computed with (the decoy bounds, or the true values for
    infinite decoys).
    """

    key_per_pulse: float
    qber: float
    gain: float
    single_photon_yield_lower: float
    single_photon_error_upper: float
    positive: bool


def gain(transmittance: float, dark_yield: float, mu: float) -> float:
    """Return ``Q_mu = 1 - (1 - Y0) exp(-eta mu)``, the chance that a pulse of mean
    photon number ``mu`` gives a click (``mu`` may be 0: the vacuum's gain is ``Y0``).

    Raises ValueError naming the parameter.
    """
    check_link(transmittance, dark_yield)
    _check_intensity("mu", mu, allow_zero=True)
    return -math.expm1(-transmittance * mu) * (1.0 - dark_yield) + dark_yield


def error_gain(transmittance: float, dark_yield: float, mu: float, misalignment: float) -> float:
    """Return ``E_mu Q_mu = e0 Y0 + e_d (Q_mu - Y0)``, the chance of a wrong click.

    Raises ValueError naming the parameter.
    """
    _check_misalignment(misalignment)
    signal = gain(transmittance, dark_yield, mu) - dark_yield
    return _E0 * dark_yield + misalignment * signal


def single_photon_yield(transmittance: float, dark_yield: float) -> float:
    """Return the true ``Y1 = 1 - (1 - Y0)(1 - eta)``. Raises ValueError naming the parameter."""
    check_link(transmittance, dark_yield)
    return dark_yield + (1.0 - dark_yield) * transmittance


def single_photon_error(transmittance: float, dark_yield: float, misalignment: float) -> float:
    """Return the true ``e1 = (e0 Y0 + e_d (Y1 - Y0)) / Y1`` (``e_d`` when nothing clicks).

    Raises ValueError naming the parameter.
    """
    _check_misalignment(misalignment)
    y1 = single_photon_yield(transmittance, dark_yield)
    if y1 == 0.0:
        return misalignment
    return (_E0 * dark_yield + misalignment * (y1 - dark_yield)) / y1


def _vacuum_weak_bounds(
    transmittance: float, dark_yield: float, params: Bb84Params
) -> tuple[float, float]:
    """Ma et al.'s ``(Y1_L, e1_U)`` from the gains the link would show."""
    mu, nu = params.mu, params.nu
    q_mu_e = gain(transmittance, dark_yield, mu) * math.exp(mu)
    q_nu_e = gain(transmittance, dark_yield, nu) * math.exp(nu)
    y1_low = (mu / (mu * nu - nu * nu)) * (
        q_nu_e - q_mu_e * nu * nu / (mu * mu) - (mu * mu - nu * nu) / (mu * mu) * dark_yield
    )
    if y1_low <= 0.0:
        return 0.0, _E0
    en_qn_e = error_gain(transmittance, dark_yield, nu, params.misalignment) * math.exp(nu)
    e1_up = (en_qn_e - _E0 * dark_yield) / (y1_low * nu)
    return y1_low, min(_E0, max(0.0, e1_up))


def decoy_bb84(
    transmittance: float,
    dark_yield: float,
    params: Bb84Params,
    *,
    decoy: DecoyMethod = "vacuum+weak",
) -> Bb84Rate:
    """Return the asymptotic secret key per pulse of decoy-state BB84 (GLLP).

    ``transmittance`` is the total ``eta`` in [0, 1] (channel x receiver optics x
    detector efficiency); ``dark_yield`` is ``Y0`` in [0, 1], the chance of a click per
    pulse with no signal. ``decoy`` chooses Ma et al.'s vacuum + weak decoy bounds or the
    true single-photon values (infinite decoys). The key is clipped at zero. Raises
    ValueError naming the parameter.
    """
    check_link(transmittance, dark_yield)
    if decoy not in _DECOY_METHODS:
        raise ValueError(f"decoy must be one of {_DECOY_METHODS}, got {decoy!r}")
    mu = params.mu
    q_mu = gain(transmittance, dark_yield, mu)
    eq_mu = error_gain(transmittance, dark_yield, mu, params.misalignment)
    # With no click at all the QBER is 0/0; its limit for a vanishing signal is e_d.
    e_mu = min(_E0, eq_mu / q_mu) if q_mu > 0.0 else params.misalignment
    if decoy == "infinite":
        y1 = single_photon_yield(transmittance, dark_yield)
        e1 = single_photon_error(transmittance, dark_yield, params.misalignment)
    else:
        y1, e1 = _vacuum_weak_bounds(transmittance, dark_yield, params)
    q1 = y1 * mu * math.exp(-mu)
    raw = params.sifting * (q1 * (1.0 - h2(e1)) - params.ec_efficiency * q_mu * h2(e_mu))
    return Bb84Rate(
        key_per_pulse=max(0.0, raw),
        qber=e_mu,
        gain=q_mu,
        single_photon_yield_lower=y1,
        single_photon_error_upper=e1,
        positive=raw > 0.0,
    )
