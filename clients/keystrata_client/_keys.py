"""Key delivery to SAEs: the three calls of ETSI GS QKD 014 V1.1.1 (2019-02).

An SAE (an encryptor or application) talks to the key manager of its own station over
HTTPS with mutual TLS; its client certificate says who it is. Base path
``/api/v1/keys`` (the standard's names, from memory of the standard):

=====================  ==============================================  ==============
call                   method and path                                 answer
=====================  ==============================================  ==============
Get status             GET  ``/{slave_SAE_ID}/status``                 Status
Get key                POST ``/{slave_SAE_ID}/enc_keys`` (Key request)  Key container
                       GET  ``/{slave_SAE_ID}/enc_keys?number=&size=``
Get key with key IDs   POST ``/{master_SAE_ID}/dec_keys`` (Key IDs)     Key container
                       GET  ``/{master_SAE_ID}/dec_keys?key_ID=``
=====================  ==============================================  ==============

Answers are checked before they are returned (``_key_answers``): an answer that fails a
check raises :class:`KeystrataClientError`.

Retries, and why they differ per call:

* ``status`` reads and changes nothing, so it is sent again after any transport error
  and after a 503.
* ``get_keys`` (enc_keys) makes the node allocate keys to this SAE. Once the request may
  have reached the node, sending it again could allocate a second set while the first
  is lost with its answer: keys the caller never learns, held for its partner. So it is
  retried only when the connection was never established (``httpx.ConnectError``,
  ``httpx.ConnectTimeout``; also ``httpx.PoolTimeout``, raised while waiting for a free
  connection of the pool, before anything is written). Never after a read timeout, a
  reset or any answer, 503 included.
* ``get_keys_with_ids`` (dec_keys) makes the node hand out and then destroy those keys:
  a lost answer loses them for good. Same rule as ``get_keys``.

When a key call fails after the request may have been sent, the error is an
:class:`UncertainDeliveryError` (a :class:`TransportError`): the node may have allocated
or destroyed the keys. Whether to try again is the caller's decision.

Key material never appears in a ``repr``, an error message or a log line: :class:`Key`
hides its bytes from ``repr`` and offers :meth:`Key.digest` (SHA-256) for comparisons.

This module and ``_key_answers`` are the sans-IO core: they build requests, check
answers and decide retries. :class:`KeyClient` (``_key_client``) and
:class:`AsyncKeyClient` (``_async_key_client``) only send.
"""

from __future__ import annotations

import logging
import uuid
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Final, Literal

import httpx

from keystrata_client._errors import ApiError, KeystrataClientError, TransportError
from keystrata_client._http import path_segment, wrap_transport
from keystrata_client._key_answers import is_key_id

#: The logger of both key clients; it names calls and errors, never key material.
logger = logging.getLogger("keystrata_client.keys")

#: Base path of the key delivery API (ETSI GS QKD 014 V1.1.1).
BASE_PATH: Final = "/api/v1/keys"
#: Longest single wait between two attempts, in seconds.
MAX_BACKOFF: Final = 5.0

#: ``"post"`` sends a JSON body; ``"get"`` puts the arguments in the query string.
RequestForm = Literal["post", "get"]

# Raised before a single byte of the request is written: safe to send again, whatever
# the request does at the node.
_RAISED_BEFORE_SENDING: Final = (httpx.ConnectError, httpx.ConnectTimeout, httpx.PoolTimeout)


class UncertainDeliveryError(TransportError):
    """A key call lost its answer after the request may have reached the node.

    The node may have allocated the keys (enc_keys) or handed them out and destroyed
    them (dec_keys); the caller cannot know. The SDK does not send such a request again.
    The ``httpx`` exception is chained as ``__cause__``.
    """


# -- requests ----------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class KeyRequest:
    """One request, and whether it may be sent again after the request left."""

    call_name: str
    method: str
    path: str
    idempotent: bool
    params: dict[str, str | int] | None = None
    body: dict[str, Any] | None = None


def status_request(slave_sae_id: str) -> KeyRequest:
    """Return the Get status request."""
    return KeyRequest("status", "GET", f"{BASE_PATH}/{path_segment(slave_sae_id)}/status", True)


def _sae_id_list(values: Iterable[str], name: str) -> list[str]:
    out = list(values)
    if isinstance(values, str) or not all(isinstance(v, str) and v for v in out):
        raise ValueError(f"{name} must be a sequence of non-empty SAE IDs")
    return out


def enc_keys_request(
    slave_sae_id: str,
    number: int,
    size: int | None,
    additional_slave_sae_ids: Iterable[str],
    extension_mandatory: Sequence[Mapping[str, Any]],
    extension_optional: Sequence[Mapping[str, Any]],
    form: RequestForm,
) -> KeyRequest:
    """Return the Get key request; raise ValueError on an invalid argument."""
    if not isinstance(number, int) or isinstance(number, bool) or number < 1:
        raise ValueError("number must be a positive integer")
    if size is not None and (
        not isinstance(size, int) or isinstance(size, bool) or size < 8 or size % 8
    ):
        raise ValueError("size is in bits: a positive multiple of 8")
    additional = _sae_id_list(additional_slave_sae_ids, "additional_slave_sae_ids")
    path = f"{BASE_PATH}/{path_segment(slave_sae_id)}/enc_keys"
    if form == "get":
        if additional or extension_mandatory or extension_optional:
            raise ValueError(
                "the GET form carries only number and size; use form='post' for "
                "additional slave SAEs and extensions"
            )
        params: dict[str, str | int] = {"number": number}
        if size is not None:
            params["size"] = size
        return KeyRequest("enc_keys", "GET", path, False, params=params)
    if form != "post":
        raise ValueError("form must be 'post' or 'get'")
    body: dict[str, Any] = {"number": number}
    if size is not None:
        body["size"] = size
    if additional:
        body["additional_slave_SAE_IDs"] = additional
    if extension_mandatory:
        body["extension_mandatory"] = [dict(e) for e in extension_mandatory]
    if extension_optional:
        body["extension_optional"] = [dict(e) for e in extension_optional]
    return KeyRequest("enc_keys", "POST", path, False, body=body)


def key_id_list(key_ids: Iterable[str]) -> list[str]:
    """Return ``key_ids`` as a list after checking each is a UUID, once.

    Raises:
        ValueError: empty, a single string, a key ID that is not a UUID, or a repeat.
    """
    if isinstance(key_ids, str):
        raise ValueError("key_ids must be a sequence of key IDs, not one string")
    ids = list(key_ids)
    if not ids:
        raise ValueError("key_ids must not be empty")
    for key_id in ids:
        if not is_key_id(key_id):
            raise ValueError(f"{key_id!r} is not a UUID key ID (RFC 9562 section 4)")
    if len({uuid.UUID(k) for k in ids}) != len(ids):
        raise ValueError("a key ID appears twice in key_ids")
    return ids


def dec_keys_request(master_sae_id: str, ids: list[str], form: RequestForm) -> KeyRequest:
    """Return the Get key with key IDs request for the checked ``ids``."""
    path = f"{BASE_PATH}/{path_segment(master_sae_id)}/dec_keys"
    if form == "get":
        if len(ids) != 1:
            raise ValueError("the GET form carries exactly one key_ID; use form='post'")
        return KeyRequest("dec_keys", "GET", path, False, params={"key_ID": ids[0]})
    if form != "post":
        raise ValueError("form must be 'post' or 'get'")
    body = {"key_IDs": [{"key_ID": k} for k in ids]}
    return KeyRequest("dec_keys", "POST", path, False, body=body)


# -- retry rules -------------------------------------------------------------------------


def may_resend_after_transport(request: KeyRequest, exc: httpx.HTTPError) -> bool:
    """Return True when ``request`` may be sent again after ``exc``."""
    if isinstance(exc, _RAISED_BEFORE_SENDING):
        return True
    return request.idempotent and isinstance(exc, httpx.TransportError)


def may_resend_after_answer(request: KeyRequest, exc: ApiError) -> bool:
    """Return True when ``request`` may be sent again after the error answer ``exc``."""
    return request.idempotent and exc.retryable


def transport_failure(request: KeyRequest, exc: httpx.HTTPError) -> KeystrataClientError:
    """Return the error to raise when ``request`` failed with ``exc`` for good."""
    # UnsupportedProtocol: the URL's scheme was refused before any connection.
    if request.idempotent or isinstance(exc, (*_RAISED_BEFORE_SENDING, httpx.UnsupportedProtocol)):
        return wrap_transport(exc)
    # Anything else (read timeout, reset, protocol error, an answer that could not be
    # decoded) may come after the node acted on the request.
    effect = "allocated" if request.call_name == "enc_keys" else "delivered and destroyed"
    return UncertainDeliveryError(
        f"{request.call_name}: {type(exc).__name__} after the request may have reached the node; "
        f"the keys may have been {effect} (not sent again)"
    )


def backoff_delay(backoff: float, attempt: int) -> float:
    """Return the seconds to wait after attempt number ``attempt`` (from 0)."""
    return float(min(MAX_BACKOFF, backoff * 2**attempt))


def check_retry_settings(attempts: int, backoff: float) -> None:
    """Raise ValueError when ``attempts`` < 1 or ``backoff`` is negative."""
    if attempts < 1:
        raise ValueError("attempts must be at least 1")
    if backoff < 0:
        raise ValueError("backoff must not be negative")
