"""The repeaterless bound: no point-to-point QKD link beats it.

Pirandola, Laurenza, Ottaviani and Banchi, "Fundamental limits of repeaterless quantum
communications", Nat. Commun. 8, 15043 (2017) (PLOB): the secret-key capacity of a
pure-loss bosonic channel of transmittance ``eta`` is ``-log2(1 - eta)`` bits per channel
use, about ``1.44 eta`` at high loss. A thermal-loss channel (excess noise) has a lower
capacity, so the pure-loss value bounds every link of the same transmittance.

Apply it to the *channel's* transmittance: losses inside a trusted receiver (optics,
detector efficiency) are not part of the bound, so the bound on the total transmittance
is lower (stricter) than the one that holds.
"""

from __future__ import annotations

import math

__all__ = ["plob_bits_per_use", "plob_bps"]


def plob_bits_per_use(transmittance: float) -> float:
    """Return ``-log2(1 - transmittance)``, secret bits per channel use at most.

    ``transmittance`` is in [0, 1); 0 gives 0. At 1 the bound is infinite, so 1 is
    refused. Raises ValueError naming the parameter.
    """
    if not 0.0 <= transmittance < 1.0:
        raise ValueError(f"transmittance must be in [0, 1), got {transmittance!r}")
    # log1p keeps full precision at the high losses of real links (eta of 1e-8 and below).
    return -math.log1p(-transmittance) / math.log(2.0)


def plob_bps(transmittance: float, clock_hz: float) -> float:
    """Return the PLOB bound in secret bits per second at ``clock_hz`` channel uses per second.

    Raises ValueError when ``transmittance`` is not in [0, 1) or ``clock_hz`` is not a
    positive finite number.
    """
    if not (clock_hz > 0.0 and math.isfinite(clock_hz)):
        raise ValueError(f"clock_hz must be a positive finite number, got {clock_hz!r}")
    return plob_bits_per_use(transmittance) * clock_hz
