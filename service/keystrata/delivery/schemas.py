"""The data formats of ETSI GS QKD 014 V1.1.1 (2019-02), "Protocol and data format of
REST-based key delivery API", as request and answer models.

Field names, types and their meaning follow the standard's data format clause (Status,
Key request, Key container, Key IDs, Error); clause numbers and wording are cited from
memory. Types are strict: JSON ``true`` is not a number and ``"8"`` is not an integer.
"""

from __future__ import annotations

from typing import Annotated, Any

from pydantic import BaseModel, ConfigDict, Field, StringConstraints

SaeId = Annotated[str, StringConstraints(strict=True, min_length=1, max_length=64)]
KeyIdStr = Annotated[
    str,
    StringConstraints(
        strict=True,
        pattern=r"^[0-9a-fA-F]{8}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{12}$",
    ),
]
Extension = dict[str, Any]


class _Strict(BaseModel):
    # The standard allows extension fields only where it names them; anything else is
    # a malformed request (400). Answers are built by us and validated the same way.
    model_config = ConfigDict(extra="forbid", strict=True)


class KeyRequest(_Strict):
    """Key request (body of Get key): all members optional."""

    number: Annotated[int, Field(strict=True, ge=1)] | None = None
    size: Annotated[int, Field(strict=True, ge=1)] | None = None
    additional_slave_SAE_IDs: list[SaeId] | None = None
    extension_mandatory: list[Extension] | None = None
    extension_optional: list[Extension] | None = None


class KeyIdEntry(_Strict):
    key_ID: KeyIdStr
    key_ID_extension: Extension | None = None


class KeyIds(_Strict):
    """Key IDs (body of Get key with key IDs)."""

    key_IDs: Annotated[list[KeyIdEntry], Field(min_length=1)]
    key_IDs_extension: Extension | None = None


class KeyEntry(_Strict):
    key_ID: str
    key_ID_extension: Extension | None = None
    key: str = Field(description="the key, Base64 (RFC 4648 section 4)")
    key_extension: Extension | None = None


class KeyContainer(_Strict):
    keys: list[KeyEntry]
    key_container_extension: Extension | None = None


class Status(_Strict):
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
    status_extension: Extension | None = None


class ErrorBody(_Strict):
    message: str
    details: list[Extension] | None = None
