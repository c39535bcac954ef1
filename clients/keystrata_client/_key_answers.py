"""What a node answers to the key calls: the Status and the Key container, checked.

ETSI GS QKD 014 V1.1.1 (2019-02). Answers are checked before they are returned:
``key`` must be canonical Base64 with the standard alphabet and padding (RFC 4648
sections 4 and 3.5), ``key_ID`` a UUID in its string form (RFC 9562 section 4), and the
keys as many and as large as the request asked for. An answer that fails a check raises
:class:`KeystrataClientError` naming the call and the field, never the key text.

Sans-IO: both key clients parse their answers here.
"""

from __future__ import annotations

import base64
import hashlib
import re
import uuid
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Final, TypeGuard

from keystrata_client._errors import KeystrataClientError

# RFC 9562 section 4: 8-4-4-4-12 hexadecimal digits; input may be either case.
_UUID_TEXT: Final = re.compile(
    r"[0-9a-fA-F]{8}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{12}"
)


def _invalid_answer(call_name: str, problem: str) -> KeystrataClientError:
    return KeystrataClientError(f"{call_name}: invalid answer: {problem}")


def _count_field(obj: Mapping[str, Any], name: str, call_name: str) -> int:
    value = obj.get(name)
    # bool is an int in Python; JSON true is not a count.
    if not isinstance(value, int) or isinstance(value, bool) or value < 0:
        raise _invalid_answer(call_name, f"{name} is not a non-negative integer")
    return value


def _text_field(obj: Mapping[str, Any], name: str, call_name: str) -> str:
    value = obj.get(name)
    if not isinstance(value, str) or not value:
        raise _invalid_answer(call_name, f"{name} is not a non-empty string")
    return value


def _extension_field(obj: Mapping[str, Any], name: str, call_name: str) -> dict[str, Any] | None:
    value = obj.get(name)
    if value is None:
        return None
    if not isinstance(value, dict):
        raise _invalid_answer(call_name, f"{name} is not an object")
    return value


# Attribute name -> the standard's field name, in the standard's order.
_STATUS_FIELDS: Final = (
    ("source_kme_id", "source_KME_ID"),
    ("target_kme_id", "target_KME_ID"),
    ("master_sae_id", "master_SAE_ID"),
    ("slave_sae_id", "slave_SAE_ID"),
    ("key_size", "key_size"),
    ("stored_key_count", "stored_key_count"),
    ("max_key_count", "max_key_count"),
    ("max_key_per_request", "max_key_per_request"),
    ("max_key_size", "max_key_size"),
    ("min_key_size", "min_key_size"),
    ("max_sae_id_count", "max_SAE_ID_count"),
)


@dataclass(frozen=True, slots=True)
class KeyStatus:
    """The Status object: call_name a master SAE can ask of its node for one slave SAE.

    Attributes are the standard's fields in snake case; :meth:`to_json` and
    :meth:`from_json` use the standard's own names (``source_KME_ID``, ...). Sizes are
    in bits.
    """

    source_kme_id: str
    target_kme_id: str
    master_sae_id: str
    slave_sae_id: str
    key_size: int
    stored_key_count: int
    max_key_count: int
    max_key_per_request: int
    max_key_size: int
    min_key_size: int
    max_sae_id_count: int
    status_extension: dict[str, Any] | None = field(default=None, hash=False)

    @classmethod
    def from_json(cls, obj: Mapping[str, Any]) -> KeyStatus:
        """Return the status read from a Status object; unknown fields are ignored.

        Raises:
            KeystrataClientError: a field is missing or of the wrong type.
        """
        call_name = "status"
        values: dict[str, Any] = {}
        for attr, name in _STATUS_FIELDS:
            if attr.endswith("_id"):
                values[attr] = _text_field(obj, name, call_name)
            else:
                values[attr] = _count_field(obj, name, call_name)
        return cls(**values, status_extension=_extension_field(obj, "status_extension", call_name))

    def to_json(self) -> dict[str, Any]:
        """Return the Status object with the standard's field names."""
        out: dict[str, Any] = {name: getattr(self, attr) for attr, name in _STATUS_FIELDS}
        if self.status_extension is not None:
            out["status_extension"] = self.status_extension
        return out


@dataclass(frozen=True, slots=True)
class Key:
    """One key and its ID. ``repr`` shows the ID and size, never the bytes.

    Attributes:
        key_id: the key's UUID, as the node wrote it.
        key: the key bytes.
        key_id_extension, key_extension: the standard's optional extension objects.
    """

    key_id: str
    key: bytes = field(repr=False)
    key_id_extension: dict[str, Any] | None = field(default=None, repr=False, hash=False)
    key_extension: dict[str, Any] | None = field(default=None, repr=False, hash=False)

    @property
    def size(self) -> int:
        """Return the key size in bits."""
        return 8 * len(self.key)

    def digest(self) -> str:
        """Return the SHA-256 of the key bytes, in hexadecimal: safe to show and compare."""
        return hashlib.sha256(self.key).hexdigest()

    def __repr__(self) -> str:
        return f"Key(key_id={self.key_id!r}, size={self.size})"


@dataclass(frozen=True, slots=True)
class KeyContainer:
    """The Key container of an answer: the keys, in the node's order."""

    keys: tuple[Key, ...]
    key_container_extension: dict[str, Any] | None = field(default=None, repr=False, hash=False)

    @property
    def key_ids(self) -> tuple[str, ...]:
        """Return the key IDs, in order."""
        return tuple(k.key_id for k in self.keys)

    def __len__(self) -> int:
        return len(self.keys)

    def __iter__(self) -> Iterator[Key]:
        return iter(self.keys)


def is_key_id(value: object) -> TypeGuard[str]:
    """Return True when ``value`` is a UUID in its string form (RFC 9562 section 4)."""
    return isinstance(value, str) and _UUID_TEXT.fullmatch(value) is not None


def _decode_key(text: object, call_name: str, index: int) -> bytes:
    """Return the bytes of a Base64 ``key``; errors never repeat the text."""
    if not isinstance(text, str) or not text:
        raise _invalid_answer(call_name, f"keys[{index}].key is not a non-empty string")
    try:
        # validate=True refuses characters outside the RFC 4648 section 4 alphabet
        # instead of skipping them; a non-ASCII str raises ValueError too.
        raw = base64.b64decode(text, validate=True)
    except ValueError:
        raise _invalid_answer(
            call_name, f"keys[{index}].key is not Base64 (RFC 4648 section 4)"
        ) from None
    # RFC 4648 section 3.5: a decoder may refuse non-zero pad bits; one key has one text.
    if base64.b64encode(raw).decode("ascii") != text:
        raise _invalid_answer(
            call_name, f"keys[{index}].key is not canonical Base64 (RFC 4648 section 3.5)"
        )
    if not raw:
        raise _invalid_answer(call_name, f"keys[{index}].key is empty")
    return raw


def parse_container(answer: Mapping[str, Any], call_name: str) -> KeyContainer:
    """Return the Key container read from ``answer``; raise on any invalid field."""
    raw_keys = answer.get("keys")
    if not isinstance(raw_keys, list) or not raw_keys:
        raise _invalid_answer(call_name, "keys is not a non-empty list")
    keys: list[Key] = []
    seen: set[uuid.UUID] = set()
    for index, item in enumerate(raw_keys):
        if not isinstance(item, dict):
            raise _invalid_answer(call_name, f"keys[{index}] is not an object")
        key_id = item.get("key_ID")
        if not is_key_id(key_id):
            raise _invalid_answer(
                call_name, f"keys[{index}].key_ID is not a UUID (RFC 9562 section 4)"
            )
        if uuid.UUID(key_id) in seen:
            raise _invalid_answer(call_name, f"key_ID {key_id} appears twice")
        seen.add(uuid.UUID(key_id))
        keys.append(
            Key(
                key_id=key_id,
                key=_decode_key(item.get("key"), call_name, index),
                key_id_extension=_extension_field(item, "key_ID_extension", call_name),
                key_extension=_extension_field(item, "key_extension", call_name),
            )
        )
    return KeyContainer(tuple(keys), _extension_field(answer, "key_container_extension", call_name))


def check_enc_answer(container: KeyContainer, number: int, size: int | None) -> KeyContainer:
    """Return ``container`` if it holds ``number`` keys of ``size`` bits; else raise."""
    call_name = "enc_keys"
    if len(container) != number:
        raise _invalid_answer(call_name, f"{len(container)} keys for a request of {number}")
    for key in container:
        if size is not None and key.size != size:
            raise _invalid_answer(call_name, f"key {key.key_id} has {key.size} bits, not {size}")
    return container


def check_dec_answer(container: KeyContainer, key_ids: Sequence[str]) -> KeyContainer:
    """Return ``container`` if it holds exactly the keys asked for; else raise."""
    asked = {uuid.UUID(k) for k in key_ids}
    got = {uuid.UUID(k) for k in container.key_ids}
    if got != asked:
        missing = sorted(str(k) for k in asked - got)
        extra = sorted(str(k) for k in got - asked)
        raise _invalid_answer(
            "dec_keys", f"key IDs differ from the request (missing {missing}, extra {extra})"
        )
    return container
