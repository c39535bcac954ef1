"""Binary entropy and the Shor-Preskill rate of ideal single-photon BB84.

``h2`` is the binary (Shannon) entropy in bits. The Shor-Preskill rate is the secret
fraction of BB84 with a perfect single-photon source, one-way post-processing and a
symmetric bit and phase error rate ``e``: ``1 - 2 h2(e)`` (Shor and Preskill, "Simple
proof of security of the BB84 quantum key distribution protocol", PRL 85, 441 (2000)).
It vanishes at ``e`` of about 11.0 %, :data:`SHOR_PRESKILL_THRESHOLD`, found here by
bisection when the module is imported.
"""

from __future__ import annotations

import math

__all__ = ["SHOR_PRESKILL_THRESHOLD", "h2", "shor_preskill_rate"]


def h2(p: float) -> float:
    """Return the binary entropy ``-p log2 p - (1 - p) log2 (1 - p)`` in bits.

    ``h2(0) = h2(1) = 0`` (the limit of ``x log2 x`` at 0). Raises ValueError when ``p``
    is not in [0, 1].
    """
    if not 0.0 <= p <= 1.0:
        raise ValueError(f"p must be in [0, 1], got {p!r}")
    if p in (0.0, 1.0):
        return 0.0
    return -p * math.log2(p) - (1.0 - p) * math.log2(1.0 - p)


def _sp_fraction(qber: float) -> float:
    return 1.0 - 2.0 * h2(qber)


def shor_preskill_rate(qber: float) -> float:
    """Return ``max(0, 1 - 2 h2(qber))``, secret bits per sifted bit of ideal BB84.

    Raises ValueError when ``qber`` is not in [0, 0.5] (an error rate above one half means
    the bits are flipped, not that they are secret).
    """
    if not 0.0 <= qber <= 0.5:
        raise ValueError(f"qber must be in [0, 0.5], got {qber!r}")
    return max(0.0, _sp_fraction(qber))


def _threshold() -> float:
    # 1 - 2 h2(e) falls strictly on (0, 1/2): +1 at 0, -1 at 1/2, so bisection converges.
    lo, hi = 1e-6, 0.5
    while hi - lo > 1e-15:
        mid = 0.5 * (lo + hi)
        if _sp_fraction(mid) > 0.0:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


#: The QBER where ``1 - 2 h2(e)`` reaches zero, about 0.110 (Shor and Preskill 2000).
SHOR_PRESKILL_THRESHOLD: float = _threshold()
