"""Ledger entries: event names and their canonical encoding.

An entry is a JSON object canonicalised by RFC 8785 (JSON Canonicalization Scheme); those
bytes are what the ledger stores and, later, what its Merkle tree hashes. Entries never
hold key material: only identifiers, sizes and counts.

Event names are ours and stable; the table in DEVELOPERS.md lists them.
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import datetime
from enum import StrEnum
from typing import Any

import rfc8785

ENTRY_VERSION = 1


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
    KEY_ALLOCATED = "key.allocated"
    KEY_DELIVERED = "key.delivered"
    KEY_EXPIRED = "key.expired"
    KEY_REFUSED = "key.refused"
    KEK_ROTATION_STARTED = "kek.rotation_started"
    KEK_ROTATED = "kek.rotated"


def timestamp(at: datetime) -> str:
    """RFC 3339 UTC timestamp with microseconds, e.g. ``2026-12-01T10:00:00.000000Z``."""
    return at.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def encode_entry(
    *, index: int, event: Event, node_id: str, at: datetime, fields: Mapping[str, Any]
) -> bytes:
    """Return the canonical bytes of one ledger entry.

    ``fields`` must be JSON values (str, int, bool, None, lists, objects); floats are
    allowed but RFC 8785 serialises them by the ECMAScript rules.
    """
    reserved = {"v", "index", "event", "node", "at"} & fields.keys()
    if reserved:
        raise ValueError(f"ledger fields may not be named {sorted(reserved)}")
    body = {
        "v": ENTRY_VERSION,
        "index": index,
        "event": str(event),
        "node": node_id,
        "at": timestamp(at),
        **fields,
    }
    return rfc8785.dumps(body)
