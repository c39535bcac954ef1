"""Key supply of a station pair: what its two links allow, and the buffer it needs.

A pair (A, B) behind relay R gets key made of link key from R-A and R-B. A segment of n
bytes spends n bytes of R-A key and n + 32 bytes of R-B key (the 32-byte one-time MAC key
of the forwarded ciphertext), so the pair can get at most
``min(R_A, R_B n / (n + 32))`` before it shares either link with other pairs. How the
links are shared between pairs is the scheduler's fairness rule, applied by the caller.

Cloud spells with exponentially distributed lengths of mean b (common practice as a
first model): a spell outlasts a buffer B drained at demand d with probability
exp(-B / (d b)), so ``B = d b ln(1 / P)`` keeps the chance of running dry in one spell
at P.
"""

from __future__ import annotations

import math

__all__ = [
    "MAC_KEY_BYTES",
    "buffer_for_spell_bits",
    "pair_ceiling_bps",
    "seconds_until_empty",
    "spell_shortfall_probability",
]

#: Link key the relay spends per forwarded segment on the second link (one-time MAC).
MAC_KEY_BYTES = 32


def _number(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value)


def _check(name: str, value: float) -> None:
    if not (_number(value) and value >= 0):
        raise ValueError(f"{name} must be a number >= 0, got {value!r}")


def pair_ceiling_bps(rate_a_bps: float, rate_b_bps: float, segment_bytes: int) -> float:
    """The most pair key links R-A and R-B can carry, bits per second, before sharing.

    Raises:
        ValueError: a rate not a finite number >= 0, or ``segment_bytes`` not a positive
            integer (the message names it).
    """
    _check("rate_a_bps", rate_a_bps)
    _check("rate_b_bps", rate_b_bps)
    ok = isinstance(segment_bytes, int) and not isinstance(segment_bytes, bool)
    if not ok or segment_bytes <= 0:
        raise ValueError(f"segment_bytes must be a positive integer, got {segment_bytes!r}")
    return min(rate_a_bps, rate_b_bps * segment_bytes / (segment_bytes + MAC_KEY_BYTES))


def buffer_for_spell_bits(
    demand_bps: float, mean_spell_s: float, shortfall_probability: float
) -> float:
    """The buffer that outlasts a cloud spell with probability ``1 - shortfall_probability``.

    Raises:
        ValueError: a negative or non-finite input, or a probability outside (0, 1) (named).
    """
    _check("demand_bps", demand_bps)
    _check("mean_spell_s", mean_spell_s)
    if not (_number(shortfall_probability) and 0 < shortfall_probability < 1):
        raise ValueError(f"shortfall_probability must be in (0, 1), got {shortfall_probability!r}")
    return demand_bps * mean_spell_s * math.log(1.0 / shortfall_probability)


def spell_shortfall_probability(
    buffer_bits: float, demand_bps: float, mean_spell_s: float
) -> float:
    """The chance that one cloud spell drains ``buffer_bits`` at ``demand_bps`` (0 with no
    demand or no spells).

    Raises:
        ValueError: a negative or non-finite input (named).
    """
    _check("buffer_bits", buffer_bits)
    _check("demand_bps", demand_bps)
    _check("mean_spell_s", mean_spell_s)
    if demand_bps == 0 or mean_spell_s == 0:
        return 0.0
    return math.exp(-buffer_bits / (demand_bps * mean_spell_s))


def seconds_until_empty(ready_bits: float, demand_bps: float, supply_bps: float) -> float:
    """How long ``ready_bits`` last at ``demand_bps`` while ``supply_bps`` comes in.

    ``inf`` when the supply keeps up with the demand.

    Raises:
        ValueError: a negative or non-finite input (named).
    """
    _check("ready_bits", ready_bits)
    _check("demand_bps", demand_bps)
    _check("supply_bps", supply_bps)
    drain = demand_bps - supply_bps
    return math.inf if drain <= 0 else ready_bits / drain
