"""Every node-to-node message, as a strict, versioned model: one writer, one reader.

The sender builds a model and sends :meth:`PeerMessage.to_body`; the receiver calls
:func:`parse` once and hands the model to its handler. A body of an unknown kind or
version, a missing or extra member, a value of the wrong JSON type (``true`` is not a
number, ``"8"`` is not an integer) or out of bounds is refused with a clear 400 that
names the member, never its value. What a message *claims* (who owns a segment, which
SAEs a key is for) is checked by the receiver against its own registry and rows; these
models only make sure it is well formed.

Wire form: a JSON object with ``kind`` (the message kind), ``v`` (its version) and the
members below. Identifiers follow :data:`keystrata.ids.ID_PATTERN`; segment and key IDs
are UUIDs in the canonical lower-case form (RFC 9562 section 4); byte strings are Base64
(RFC 4648 section 4); times are RFC 3339 with an offset. What a node reads from a
peer's GET routes is in :mod:`keystrata.peering.answers`.
"""

from __future__ import annotations

import base64
import binascii
import json
from datetime import datetime
from typing import Annotated, Any, ClassVar, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    PlainSerializer,
    StringConstraints,
    ValidationError,
    model_validator,
)

from keystrata.errors import InvalidInput, KeystrataError
from keystrata.ids import ID_PATTERN
from keystrata.ledger import canonical

#: The version of every message kind this node writes and reads.
VERSION = 1
#: Version of the segment header both one-time MACs cover.
HEADER_VERSION: Literal[2] = 2

#: Messages one batch request may carry (the sender sends fewer; see peering/sender.py).
MAX_BATCH = 256
#: Keys one ``key.allocated`` message may carry (a group commit's worth, see delivery).
MAX_KEYS = 65_536
#: Slaves one key may have (the slave plus ``max_SAE_ID_count`` additional ones).
MAX_SLAVES = 9
NodeId = Annotated[str, StringConstraints(strict=True, pattern=ID_PATTERN)]
SaeId = NodeId
Uuid = Annotated[
    str,
    StringConstraints(
        strict=True,
        pattern=r"^[0-9a-f]{8}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12}$",
    ),
]
#: Why a station discarded a segment: a code from this list, never text a peer chose.
Reason = Literal[
    "bad_tag",
    "check_mismatch",
    "confirmation_mismatch",
    "confirmation_timeout",
    "partner_discarded",
]
Count = Annotated[int, Field(strict=True, ge=0, le=2**62)]
Positive = Annotated[int, Field(strict=True, ge=1, le=2**62)]
Epsilon = Annotated[float, Field(strict=True, ge=0, lt=1)]


def _iso_time(value: Any) -> datetime:
    if isinstance(value, datetime):
        parsed = value
    elif isinstance(value, str) and len(value) <= 40:
        try:
            parsed = datetime.fromisoformat(value)
        except ValueError:
            raise ValueError("an RFC 3339 time with an offset") from None
    else:
        raise ValueError("an RFC 3339 time with an offset")
    if parsed.tzinfo is None:
        raise ValueError("an RFC 3339 time with an offset")
    return parsed


def _b64(value: Any) -> bytes:
    if isinstance(value, bytes):
        return value
    if not isinstance(value, str):
        raise ValueError("Base64 text")
    try:
        return base64.b64decode(value, validate=True)
    except (binascii.Error, ValueError):
        raise ValueError("Base64 text (RFC 4648 section 4)") from None


Time = Annotated[
    datetime,
    BeforeValidator(_iso_time),
    PlainSerializer(lambda t: t.isoformat(), return_type=str, when_used="json"),
]
B64 = Annotated[
    bytes,
    BeforeValidator(_b64),
    PlainSerializer(lambda b: base64.b64encode(b).decode(), return_type=str, when_used="json"),
]


class StrictModel(BaseModel):
    """Base of every model that travels between nodes: no extra members, no coercion."""

    model_config = ConfigDict(extra="forbid", strict=True, frozen=True)


class LinkRange(StrictModel):
    """Bytes [offset, offset + length) of one link key block."""

    block: Uuid
    offset: Count
    length: Positive


class SegmentRange(StrictModel):
    """Bytes [offset, offset + length) of one pair key segment."""

    segment: Uuid
    offset: Count
    length: Positive


Ranges = Annotated[list[LinkRange], Field(min_length=1, max_length=4096)]


class SegmentHeader(StrictModel):
    """What the relay says of a segment; both one-time MACs cover its canonical bytes,
    so the two stations accept a segment only on the same header.

    ``notice_*`` name the bytes of link R-A (A: the notice station) that form the
    segment and its MAC key MA; ``cipher_*`` those of link R-B (B) that encrypt it and
    its MAC key M.
    """

    v: Literal[2]
    segment: Uuid
    pair: NodeId
    relay: NodeId
    notice_station: NodeId
    cipher_station: NodeId
    owner: NodeId
    length: Positive
    epsilon: Epsilon
    made_at: Time
    notice_link: NodeId
    notice_key_ranges: Ranges
    notice_mac_ranges: Ranges
    cipher_link: NodeId
    cipher_key_ranges: Ranges
    cipher_mac_ranges: Ranges

    @model_validator(mode="after")
    def _consistent(self) -> SegmentHeader:
        if self.notice_station == self.cipher_station:
            raise ValueError("notice_station and cipher_station must differ")
        if self.owner not in (self.notice_station, self.cipher_station):
            raise ValueError("owner must be one of the two stations")
        return self

    def encode(self) -> bytes:
        """The canonical bytes (RFC 8785) both MACs cover."""
        return canonical.dumps(self.model_dump(mode="json"))

    @staticmethod
    def decode(raw: bytes) -> SegmentHeader:
        """Parse header bytes as sent. Raises InvalidInput."""
        try:
            value = json.loads(raw)
        except ValueError:
            raise InvalidInput("header: not JSON") from None
        try:
            header = SegmentHeader.model_validate(value)
        except ValidationError as exc:
            raise invalid_input("header", exc) from None
        return header


class PeerMessage(StrictModel):
    """Base of every message kind; ``kind`` names the class, ``v`` its version."""

    kind: ClassVar[str]
    v: Literal[1] = 1

    def to_body(self) -> dict[str, Any]:
        """The JSON object to send (what :func:`parse` reads back)."""
        return {"kind": self.kind, **self.model_dump(mode="json")}


class RelayNotice(PeerMessage):
    """relay -> A: the header and tagA = Poly1305(MA, len(header) || header)."""

    kind: ClassVar[str] = "relay.notice"
    segment_id: Uuid
    header: B64 = Field(repr=False, max_length=1 << 20)
    tag: B64 = Field(repr=False, min_length=16, max_length=16)


class RelayCiphertext(PeerMessage):
    """relay -> B: the header, C = KA xor KB and tag = Poly1305(M, len(header) ||
    header || C)."""

    kind: ClassVar[str] = "relay.ciphertext"
    segment_id: Uuid
    header: B64 = Field(repr=False, max_length=1 << 20)
    ciphertext: B64 = Field(repr=False, min_length=1)
    tag: B64 = Field(repr=False, min_length=16, max_length=16)


class SegmentCheck(PeerMessage):
    """B -> A: B's key confirmation value for a segment."""

    kind: ClassVar[str] = "segment.check"
    segment_id: Uuid
    pair_id: NodeId
    check: B64 = Field(repr=False, min_length=16, max_length=16)


class SegmentConfirmed(SegmentCheck):
    """A -> B: A's key confirmation value; the segment is ready at A."""

    kind: ClassVar[str] = "segment.confirmed"


class SegmentDiscarded(PeerMessage):
    """Either station -> the other: the sender discarded the segment."""

    kind: ClassVar[str] = "segment.discarded"
    segment_id: Uuid
    pair_id: NodeId
    reason: Reason
    sender_side: Literal["notice", "cipher"]


class SegmentSettled(PeerMessage):
    """A -> relay: how a segment ended."""

    kind: ClassVar[str] = "segment.settled"
    segment_id: Uuid
    outcome: Literal["ready", "discarded"]
    reason: Reason | None = None


class AllocatedKey(StrictModel):
    """One key of a ``key.allocated`` message."""

    key_ID: Uuid
    master: SaeId
    slaves: Annotated[list[SaeId], Field(min_length=1, max_length=MAX_SLAVES)]
    ranges: Annotated[list[SegmentRange], Field(min_length=1, max_length=1024)]
    size_bits: Positive
    allocated_at: Time
    expires_at: Time

    @model_validator(mode="after")
    def _consistent(self) -> AllocatedKey:
        if len(set(self.slaves)) != len(self.slaves):
            raise ValueError("slaves: each SAE once")
        if self.size_bits % 8 or sum(r.length for r in self.ranges) * 8 != self.size_bits:
            raise ValueError("size_bits must be the ranges' length in bits")
        if self.expires_at <= self.allocated_at:
            raise ValueError("expires_at must be after allocated_at")
        return self


class KeyAllocated(PeerMessage):
    """Owner (the master's station) -> the slaves' station: keys cut from segments the
    owner owns, to be kept for the named slaves."""

    kind: ClassVar[str] = "key.allocated"
    pair_id: NodeId
    owner: NodeId
    keys: Annotated[list[AllocatedKey], Field(min_length=1, max_length=MAX_KEYS)]


class KeyExpired(PeerMessage):
    """Slaves' station -> owner: these keys were not collected in time."""

    kind: ClassVar[str] = "key.expired"
    pair_id: NodeId
    key_ids: Annotated[list[Uuid], Field(min_length=1, max_length=MAX_KEYS)]


#: What a node did with a message it applied: ``already`` for one it had applied before,
#: ``discarded`` when applying it discarded the segment.
Outcome = Literal["applied", "already", "discarded"]


class MessageResult(StrictModel):
    """What became of one message, as handlers return it and the batch route answers it:
    ``status`` 200 with the ``segment_id`` and the ``outcome``, or the status and
    ``message`` of the error it raised. Wire form: this model's JSON, every member
    present (``null`` when unset)."""

    status: int
    segment_id: str | None = None
    outcome: Outcome | None = None
    message: str | None = None

    @classmethod
    def handled(cls, segment_id: str, outcome: Outcome) -> MessageResult:
        """A message applied (200): ``segment_id`` names what it was about ("" for a
        message of keys)."""
        return cls(status=200, segment_id=segment_id, outcome=outcome)

    @classmethod
    def failed(cls, error: KeystrataError) -> MessageResult:
        """A message not applied: the error's status and its (safe) message."""
        return cls(status=error.status, message=error.message)


KINDS: dict[str, type[PeerMessage]] = {
    cls.kind: cls
    for cls in (
        RelayNotice,
        RelayCiphertext,
        SegmentCheck,
        SegmentConfirmed,
        SegmentDiscarded,
        SegmentSettled,
        KeyAllocated,
        KeyExpired,
    )
}


def kind_of(body: Any) -> type[PeerMessage]:
    """The message class a body claims to be, by kind and version. Raises InvalidInput."""
    if not isinstance(body, dict) or not isinstance(body.get("kind"), str):
        raise InvalidInput("body: a JSON object with a kind")
    cls = KINDS.get(body["kind"])
    if cls is None:
        raise InvalidInput("kind: not a message kind this node knows")
    version = body.get("v")
    if type(version) is not int or version != VERSION:
        raise InvalidInput(
            f"v: this node reads version {VERSION} of {cls.kind}",
            details=[{"field": "v", "supported": [VERSION]}],
        )
    return cls


def parse(body: Any) -> PeerMessage:
    """Read one message. Raises InvalidInput (400) naming the first bad member."""
    cls = kind_of(body)
    fields = {k: v for k, v in body.items() if k != "kind"}
    try:
        return cls.model_validate(fields)
    except ValidationError as exc:
        raise invalid_input(f"message {cls.kind}", exc) from None


def invalid_input(what: str, exc: ValidationError) -> InvalidInput:
    """A 400 naming the members that failed, never their values."""
    fields = [".".join(str(p) for p in e["loc"]) for e in exc.errors()[:8]]
    first = fields[0] if fields and fields[0] else "body"
    return InvalidInput(
        f"{what}: {first} is missing or malformed",
        details=[{"field": f or "body"} for f in fields],
    )
