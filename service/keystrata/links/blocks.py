"""Link key blocks as QKD modules deliver them, and the compact binary batch format.

A block carries: a block ID (a UUID, RFC 9562, chosen by the QKD module and identical at
both ends of the link), the key bytes, the quantum bit error rate (QBER) measured for it,
the security parameter epsilon of its privacy amplification, and when it was produced.

Binary batch, version 1 (``Content-Type: application/octet-stream``): records back to
back, each record, all integers big-endian::

    offset  size  field
    0       1     version, = 1
    1       16    block ID, the UUID's 16 bytes (RFC 9562 section 4: network byte order)
    17      8     produced at, signed microseconds since 1970-01-01T00:00:00Z
    25      8     QBER, IEEE 754 binary64
    33      8     epsilon, IEEE 754 binary64
    41      4     key length n in bytes
    45      n     key bytes
"""

from __future__ import annotations

import math
import struct
import uuid
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta

from keystrata.errors import InvalidInput

RECORD_VERSION = 1
_HEADER = struct.Struct(">B16sqddI")
HEADER_BYTES = _HEADER.size  # 45
_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)

#: QBER above 11% leaves no secret key for BB84-type protocols (Shor-Preskill bound,
#: about 11.0%); anything above 0.5 is not an error rate at all. We reject > 0.5 as
#: malformed and leave the acceptance threshold to the QKD module.
MAX_QBER = 0.5
#: How far in the future a block's production time may lie (clock skew allowance).
FUTURE_SKEW = timedelta(minutes=5)


@dataclass(frozen=True, slots=True)
class BlockIn:
    """One incoming block. ``key`` is excluded from repr so it never reaches a log."""

    block_id: str
    key: bytes = field(repr=False)
    qber: float
    epsilon: float
    produced_at: datetime


def validate_block(
    block: BlockIn, *, where: str, max_block_bytes: int, now: datetime
) -> list[dict[str, str]]:
    """Return a list of problems with ``block`` (empty when it is acceptable)."""
    problems: list[dict[str, str]] = []

    def bad(name: str, problem: str) -> None:
        problems.append({"field": f"{where}.{name}", "problem": problem})

    if not 1 <= len(block.key) <= max_block_bytes:
        bad("key", f"length must be between 1 and {max_block_bytes} bytes")
    if not (math.isfinite(block.qber) and 0.0 <= block.qber <= MAX_QBER):
        bad("qber", f"must be a number between 0 and {MAX_QBER}")
    if not (math.isfinite(block.epsilon) and 0.0 <= block.epsilon < 1.0):
        bad("epsilon", "must be a number in [0, 1)")
    if block.produced_at.tzinfo is None:
        bad("produced_at", "must carry a time zone (use UTC, e.g. 2026-12-01T10:00:00Z)")
    elif block.produced_at > now + FUTURE_SKEW:
        bad("produced_at", "lies in the future beyond the allowed clock skew of 5 minutes")
    return problems


def decode_batch(data: bytes, *, max_block_bytes: int, max_blocks: int) -> Iterator[BlockIn]:
    """Decode a binary batch record by record.

    Raises:
        InvalidInput: a truncated record, an unknown version, a length over the limit, or
            more records than allowed. The message gives the byte offset, never content.
    """
    view = memoryview(data)
    offset = 0
    count = 0
    while offset < len(view):
        if len(view) - offset < HEADER_BYTES:
            raise InvalidInput(f"binary batch: truncated record header at byte {offset}")
        version, raw_id, micros, qber, epsilon, length = _HEADER.unpack_from(view, offset)
        if version != RECORD_VERSION:
            raise InvalidInput(
                f"binary batch: record at byte {offset} has version {version}; "
                f"this node reads version {RECORD_VERSION}"
            )
        if length > max_block_bytes or length == 0:
            raise InvalidInput(
                f"binary batch: record at byte {offset} declares {length} key bytes; "
                f"allowed 1 to {max_block_bytes}"
            )
        start = offset + HEADER_BYTES
        if start + length > len(view):
            raise InvalidInput(f"binary batch: record at byte {offset} is truncated")
        count += 1
        if count > max_blocks:
            raise InvalidInput(f"binary batch: more than {max_blocks} blocks in one request")
        try:
            produced = _EPOCH + timedelta(microseconds=micros)
        except OverflowError as exc:
            raise InvalidInput(
                f"binary batch: record at byte {offset} has an impossible production time"
            ) from exc
        yield BlockIn(
            block_id=str(uuid.UUID(bytes=raw_id)),
            key=bytes(view[start : start + length]),
            qber=qber,
            epsilon=epsilon,
            produced_at=produced,
        )
        offset = start + length
