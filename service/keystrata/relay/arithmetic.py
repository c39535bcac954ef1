"""The trusted-node key relay, per segment, as plain arithmetic (ITU-T Y.3800 series
describes the key relay through trusted nodes; the names here are ours).

For a pair (A, B) and a segment of n bytes the relay takes

* KA: the next n bytes of link R-A, and MA: the next 32 bytes of link R-A,
* KB: the next n bytes of link R-B, and M: the next 32 bytes of link R-B,

and writes one *header* naming the segment, the pair, both stations, the owner, the
length, the epsilon and every link byte used (:class:`keystrata.peering.messages.
SegmentHeader`, RFC 8785 canonical JSON). It sends A a *notice*: the header with
tagA = Poly1305(MA, len(header) || header), and B the header, the ciphertext
C = KA xor KB and tag = Poly1305(M, len(header) || header || C) (RFC 8439 section 2.5;
``len`` is 4 bytes, big-endian). A checks tagA and holds KA; B checks the tag and recovers
KA = C xor KB. Only the holder of both link keys (the relay) can make a header both
stations accept. A and B then confirm the segment to each other with check values over
the key and the segment's whole identity (:class:`SegmentIdentity`, RFC 8785 JSON;
:func:`keystrata.crypto.hazmat.check_value`) before either serves it.

The security parameter of a segment is the sum of the epsilons of every link block it
touched (its key bytes and its MAC key). This is the union bound over the composable
(trace-distance) security of the blocks, common practice for composing QKD keys.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import rfc8785

MAC_KEY_BYTES = 32


def compose_epsilon(epsilons: Iterable[float]) -> float:
    """Union bound over the blocks a segment touched (see the module docstring)."""
    return float(sum(epsilons))


def mac_input(header: bytes, ciphertext: bytes = b"") -> bytes:
    """len(header) || header || C: the header's length (4 bytes, big-endian) in front so
    the split is unambiguous; the notice's tag covers the header alone (C empty)."""
    return len(header).to_bytes(4, "big") + header + ciphertext


@dataclass(frozen=True, slots=True)
class SegmentIdentity:
    """What both stations must agree on before either serves a segment."""

    segment: str
    pair: str
    notice_station: str
    cipher_station: str
    owner: str
    length: int
    epsilon: float

    def canonical(self) -> bytes:
        """The identity as RFC 8785 canonical JSON: what the check values cover."""
        return rfc8785.dumps(
            {
                "segment": self.segment,
                "pair": self.pair,
                "notice_station": self.notice_station,
                "cipher_station": self.cipher_station,
                "owner": self.owner,
                "bytes": self.length,
                "epsilon": self.epsilon,
            }
        )
