"""The data formats of ETSI GS QKD 014 V1.1.1 (2019-02), "Protocol and data format of
REST-based key delivery API", as request and answer models.

Field names, types and their meaning follow the standard's data format clause (Status,
Key request, Key container, Key IDs, Error); clause numbers and wording are cited from
memory. Types are strict: JSON ``true`` is not a number and ``"8"`` is not an integer.

Requests are read leniently where the standard leaves room: every member of the Key
request is optional (an absent body is the default request, see the Get key route), and
members the standard does not name are dropped while the body is read (clients of other
makers send some), so they never reach a use case, a row or the ledger. Answers are
strict: built by us, validated, and an absent optional member is left out of the JSON,
never written as ``null`` (the standard marks those members optional, not nullable).
"""

from __future__ import annotations

from typing import Annotated, Any

from pydantic import BaseModel, ConfigDict, Field, StringConstraints
from pydantic.json_schema import SkipJsonSchema

SaeId = Annotated[str, StringConstraints(strict=True, min_length=1, max_length=64)]
KeyIdStr = Annotated[
    str,
    StringConstraints(
        strict=True,
        pattern=r"^[0-9a-fA-F]{8}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{12}$",
    ),
]
Extension = dict[str, Any]
#: An optional member of an answer: an object when present, else left out of the JSON
#: (the routes serialise with ``exclude_none``), so the document shows no ``null``.
OptionalExtension = Extension | SkipJsonSchema[None]


def _absent_when_none(schema: dict[str, Any]) -> None:
    schema.pop("default", None)  # the default is absence, not a JSON value


def _optional_member() -> Any:
    return Field(default=None, json_schema_extra=_absent_when_none)


class _Request(BaseModel):
    # Strict JSON types; members the standard does not name are ignored (dropped).
    model_config = ConfigDict(extra="ignore", strict=True)


class _Answer(BaseModel):
    # Answers are built by us: anything unnamed is a bug.
    model_config = ConfigDict(extra="forbid", strict=True)


class KeyRequest(_Request):
    """Key request (body of Get key): all members optional."""

    number: Annotated[int, Field(strict=True, ge=1)] | None = None
    size: Annotated[int, Field(strict=True, ge=1)] | None = None
    additional_slave_SAE_IDs: list[SaeId] | None = None
    extension_mandatory: list[Extension] | None = None
    extension_optional: list[Extension] | None = None


class KeyIdEntry(_Request):
    key_ID: KeyIdStr
    key_ID_extension: Extension | None = None


class KeyIds(_Request):
    """Key IDs (body of Get key with key IDs)."""

    key_IDs: Annotated[list[KeyIdEntry], Field(min_length=1)]
    key_IDs_extension: Extension | None = None


class KeyEntry(_Answer):
    key_ID: str
    key_ID_extension: OptionalExtension = _optional_member()
    key: str = Field(description="the key, Base64 (RFC 4648 section 4)")
    key_extension: OptionalExtension = _optional_member()


class KeyContainer(_Answer):
    keys: list[KeyEntry]
    key_container_extension: OptionalExtension = _optional_member()


class Status(_Answer):
    source_KME_ID: str
    target_KME_ID: str
    master_SAE_ID: str
    slave_SAE_ID: str
    key_size: int
    stored_key_count: int
    max_key_count: int
    max_key_per_request: int
    max_key_size: int
    min_key_size: int
    max_SAE_ID_count: int
    status_extension: OptionalExtension = _optional_member()


class ErrorBody(_Answer):
    """The Error object of every route (``api/errors.error_body`` leaves out empty
    details)."""

    message: str
    details: list[Extension] | SkipJsonSchema[None] = _optional_member()
