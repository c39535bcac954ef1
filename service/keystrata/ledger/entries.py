"""Ledger entries: event names and their canonical encoding.

An entry is a JSON object canonicalised by RFC 8785 (JSON Canonicalization Scheme); those
bytes are what the ledger stores and, later, what its Merkle tree hashes. Entries never
hold key material: only identifiers, sizes and counts.

Event names are ours and stable; the table in DEVELOPERS.md lists them.

Version 2 entries also carry ``prev``: the RFC 9162 leaf hash of the entry before (Base64,
``null`` for the first). With it a verifier holding only an export names the exact entry
that was altered, removed or moved, where the Merkle root alone only says "something".
"""

from __future__ import annotations

import base64
from collections.abc import Iterator, Mapping
from datetime import datetime
from enum import StrEnum
from typing import Any

from rfc8785 import IntegerDomainError

from keystrata.ledger import canonical

ENTRY_VERSION = 2
_RESERVED = frozenset({"v", "index", "event", "node", "at", "prev"})


class Event(StrEnum):
    NODE_INITIALISED = "node.initialised"
    REGISTRY_CREATED = "registry.created"
    REGISTRY_CHANGED = "registry.changed"
    REGISTRY_RETIRED = "registry.retired"
    LINK_KEY_INGESTED = "link_key.ingested"
    LINK_KEY_REFUSED = "link_key.refused"
    AUTH_REFUSED = "auth.refused"
    RELAY_SEGMENT_MADE = "relay.segment_made"
    RELAY_SEGMENT_SETTLED = "relay.segment_settled"
    SEGMENT_RECEIVED = "segment.received"
    SEGMENT_READY = "segment.ready"
    SEGMENT_DISCARDED = "segment.discarded"
    RELAY_MESSAGE_REFUSED = "segment.message_refused"
    PEER_MESSAGE_REFUSED = "peer.message_refused"
    KEY_ALLOCATED = "key.allocated"
    KEY_DELIVERED = "key.delivered"
    KEY_EXPIRED = "key.expired"
    KEY_REFUSED = "key.refused"
    KEK_ROTATION_STARTED = "kek.rotation_started"
    KEK_ROTATED = "kek.rotated"
    PAIR_HELD = "pair.held"
    PAIR_RELEASED = "pair.released"
    REGISTRY_PEER_DISAGREES = "registry.peer_disagrees"
    REGISTRY_PEER_AGREES = "registry.peer_agrees"


def timestamp(at: datetime) -> str:
    """RFC 3339 UTC timestamp with microseconds, e.g. ``2026-12-01T10:00:00.000000Z``."""
    return at.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def encode_entry(
    *,
    index: int,
    event: Event,
    node_id: str,
    at: datetime,
    fields: Mapping[str, Any],
    prev: bytes | None = None,
) -> bytes:
    """Return the canonical bytes (RFC 8785) of one ledger entry.

    ``fields`` must be JSON values (str, int, bool, None, lists, objects); floats are
    allowed but RFC 8785 serialises them by the ECMAScript rules. ``prev`` is the leaf
    hash of entry ``index - 1`` (None for the first entry).

    Raises:
        ValueError: a reserved field name, ``prev`` given for entry 0 or missing for a
            later one, or a value RFC 8785 cannot encode (``rfc8785.CanonicalizationError``).
    """
    return prepare(event=event, node_id=node_id, at=at, fields=fields).at(index, prev)


class Prepared:
    """An entry encoded but for its ``index`` and ``prev``, which only the ledger head
    knows: :meth:`at` splices them in, so the appender does the encoding before it
    takes the head and only joins bytes while it holds it."""

    __slots__ = ("_head", "_middle", "_tail")

    def __init__(self, head: bytes, middle: bytes, tail: bytes) -> None:
        self._head, self._middle, self._tail = head, middle, tail

    def at(self, index: int, prev: bytes | None) -> bytes:
        """The entry's canonical bytes as entry ``index`` after the leaf hash ``prev``."""
        if (prev is None) != (index == 0):
            raise ValueError("prev is the previous entry's leaf hash, and only entry 0 has none")
        if not -canonical.INT_MAX <= index <= canonical.INT_MAX:
            raise IntegerDomainError(index)
        link = b"null" if prev is None else b'"' + base64.b64encode(prev) + b'"'
        return b"".join((self._head, b"%d" % index, self._middle, link, self._tail))


def prepare(*, event: Event, node_id: str, at: datetime, fields: Mapping[str, Any]) -> Prepared:
    """Encode an entry whose index and ``prev`` are not known yet (see :class:`Prepared`).

    Raises:
        ValueError: as :func:`encode_entry`.
    """
    reserved = _RESERVED & fields.keys()
    if reserved:
        raise ValueError(f"ledger fields may not be named {sorted(reserved)}")
    # The members in RFC 8785 order, "index" and "prev" with their values left out.
    body = {
        "v": ENTRY_VERSION,
        "index": 0,
        "event": str(event),
        "node": node_id,
        "at": timestamp(at),
        "prev": None,
        **fields,
    }
    pieces = canonical.members(body)
    i = pieces.index('"index":0')
    p = pieces.index('"prev":null')
    pieces[i], pieces[p] = '"index":', '"prev":'
    tail = "," + ",".join(pieces[p + 1 :]) if p + 1 < len(pieces) else ""
    return Prepared(
        canonical.utf8("{" + ",".join(pieces[: i + 1])),
        canonical.utf8("," + ",".join(pieces[i + 1 : p + 1])),
        canonical.utf8(tail + "}"),
    )


class Ref(StrEnum):
    """What an entry can be searched by (besides time and event)."""

    PAIR = "pair"
    SAE = "sae"
    KEY = "key"
    NODE = "node"
    SEGMENT = "segment"


#: Entry fields naming something an auditor searches by.
_REF_FIELDS: dict[str, Ref] = {
    "pair": Ref.PAIR,
    "sae": Ref.SAE,
    "master": Ref.SAE,
    "masters": Ref.SAE,
    "slave": Ref.SAE,
    "slaves": Ref.SAE,
    "delivered_to": Ref.SAE,
    "principal": Ref.SAE,  # auth.refused: the registered principal refused, if any
    "key_ids": Ref.KEY,
    "segment": Ref.SEGMENT,
    "segments": Ref.SEGMENT,
    "owner": Ref.NODE,
    "sender": Ref.NODE,
    "notice_station": Ref.NODE,
    "cipher_station": Ref.NODE,
    "partner": Ref.NODE,
    "peer": Ref.NODE,  # registry.peer_disagrees / peer_agrees: the peer compared with
}
#: Registry kinds whose IDs are searchable, by the kind of reference they are.
_REGISTRY_REFS = {"pairs": Ref.PAIR, "principals": Ref.SAE, "nodes": Ref.NODE}
MAX_REF_LENGTH = 128


def references(fields: Mapping[str, Any]) -> set[tuple[Ref, str]]:
    """The (kind, identifier) pairs an entry with ``fields`` names."""
    found: set[tuple[Ref, str]] = set()
    for name, value in fields.items():
        ref = _REF_FIELDS.get(name)
        if ref is not None:
            found.update((ref, v) for v in _strings(value))
    kind = _REGISTRY_REFS.get(str(fields.get("kind")))
    if kind is not None and "id" in fields:
        found.update((kind, v) for v in _strings(fields["id"]))
    return found


def _strings(value: Any) -> Iterator[str]:
    values = value if isinstance(value, list) else [value]
    yield from (v for v in values if isinstance(v, str) and 0 < len(v) <= MAX_REF_LENGTH)
