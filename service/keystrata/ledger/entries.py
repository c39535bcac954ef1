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

import rfc8785

ENTRY_VERSION = 2


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
    """Return the canonical bytes of one ledger entry.

    ``fields`` must be JSON values (str, int, bool, None, lists, objects); floats are
    allowed but RFC 8785 serialises them by the ECMAScript rules. ``prev`` is the leaf
    hash of entry ``index - 1`` (None for the first entry).
    """
    if (prev is None) != (index == 0):
        raise ValueError("prev is the previous entry's leaf hash, and only entry 0 has none")
    reserved = {"v", "index", "event", "node", "at", "prev"} & fields.keys()
    if reserved:
        raise ValueError(f"ledger fields may not be named {sorted(reserved)}")
    body = {
        "v": ENTRY_VERSION,
        "index": index,
        "event": str(event),
        "node": node_id,
        "at": timestamp(at),
        "prev": None if prev is None else base64.b64encode(prev).decode(),
        **fields,
    }
    return rfc8785.dumps(body)


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
