"""Link key blocks and the two forms a QKD module can push them in.

A block carries a block ID (an RFC 9562 UUID, identical at both ends of the link), the
key bytes, the quantum bit error rate (QBER) measured for it, the epsilon of its
privacy amplification, and the time it was produced.

JSON form: ``{"blocks": [{"block_id", "key", "qber", "epsilon", "produced_at"}]}`` with
``key`` in standard Base64 (RFC 4648 section 4, padded) and ``produced_at`` in RFC 3339
with a ``Z`` offset.

Binary form, version 1 (``Content-Type: application/octet-stream``): records back to
back, all integers big-endian::

    offset  size  field
    0       1     version, = 1
    1       16    block ID, the UUID's 16 bytes (RFC 9562 section 4, network byte order)
    17      8     produced at, signed microseconds since 1970-01-01T00:00:00Z
    25      8     QBER, IEEE 754 binary64
    33      8     epsilon, IEEE 754 binary64
    41      4     key length n in bytes
    45      n     key bytes
"""

from __future__ import annotations

import base64
import math
import struct
import uuid
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any

#: Media type of the binary form.
BINARY_MEDIA_TYPE = "application/octet-stream"
#: Version byte written at the start of every binary record.
RECORD_VERSION = 1

_HEADER = struct.Struct(">B16sqddI")
_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)
_MAX_KEY_BYTES = 2**32 - 1


@dataclass(frozen=True, slots=True)
class LinkBlock:
    """One block of link key, as a QKD module delivers it to both ends of its link.

    ``key`` is left out of ``repr`` so a block can be logged without leaking key bytes.

    Raises:
        ValueError: ``block_id`` is not a UUID in 8-4-4-4-12 form, ``key`` is empty,
            ``qber`` or ``epsilon`` is not a finite number, or ``produced_at`` has no
            time zone. Messages name the field, never the key.
    """

    block_id: str
    key: bytes = field(repr=False)
    qber: float
    epsilon: float
    produced_at: datetime

    def __post_init__(self) -> None:
        if len(self.block_id) != 36:
            raise ValueError("block_id must be a UUID in 8-4-4-4-12 hexadecimal form")
        try:
            canonical = str(uuid.UUID(self.block_id))
        except ValueError as exc:
            raise ValueError("block_id must be a UUID in 8-4-4-4-12 hexadecimal form") from exc
        object.__setattr__(self, "block_id", canonical)
        if not 1 <= len(self.key) <= _MAX_KEY_BYTES:
            raise ValueError("key must hold at least one byte")
        if not (math.isfinite(self.qber) and math.isfinite(self.epsilon)):
            raise ValueError("qber and epsilon must be finite numbers")
        if self.produced_at.tzinfo is None or self.produced_at.utcoffset() is None:
            raise ValueError("produced_at must carry a time zone")

    @classmethod
    def new(
        cls,
        key: bytes,
        *,
        qber: float,
        epsilon: float,
        produced_at: datetime | None = None,
    ) -> LinkBlock:
        """Return a block with a fresh random block ID (a version 4 UUID).

        ``produced_at`` defaults to the current time in UTC.

        Raises:
            ValueError: as the constructor.
        """
        return cls(
            block_id=str(uuid.uuid4()),
            key=key,
            qber=qber,
            epsilon=epsilon,
            produced_at=produced_at or datetime.now(UTC),
        )

    @property
    def bits(self) -> int:
        """Return the number of key bits in the block."""
        return 8 * len(self.key)


def _micros_since_epoch(moment: datetime) -> int:
    return (moment - _EPOCH) // timedelta(microseconds=1)


def _rfc3339(moment: datetime) -> str:
    return moment.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def encode_binary(blocks: Iterable[LinkBlock]) -> bytes:
    """Return ``blocks`` as one version-1 binary batch (records back to back).

    An empty iterable gives an empty batch.
    """
    parts: list[bytes] = []
    for block in blocks:
        parts.append(
            _HEADER.pack(
                RECORD_VERSION,
                uuid.UUID(block.block_id).bytes,
                _micros_since_epoch(block.produced_at),
                block.qber,
                block.epsilon,
                len(block.key),
            )
        )
        parts.append(block.key)
    return b"".join(parts)


def to_json(blocks: Iterable[LinkBlock]) -> dict[str, Any]:
    """Return ``blocks`` as the JSON ingest body ``{"blocks": [...]}``.

    ``key`` is standard padded Base64 (RFC 4648 section 4); ``produced_at`` is RFC 3339
    in UTC with a ``Z`` offset and microseconds.
    """
    return {
        "blocks": [
            {
                "block_id": block.block_id,
                "key": base64.b64encode(block.key).decode("ascii"),
                "qber": block.qber,
                "epsilon": block.epsilon,
                "produced_at": _rfc3339(block.produced_at),
            }
            for block in blocks
        ]
    }
