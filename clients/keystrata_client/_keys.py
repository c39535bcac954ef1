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

Answers are checked before they are returned: ``key`` must be canonical Base64 with the
standard alphabet and padding (RFC 4648 sections 4 and 3.5), ``key_ID`` a UUID in its
string form (RFC 9562 section 4), the number and size of keys what was asked for.
An answer that fails a check raises :class:`KeystrataClientError`.

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
"""

from __future__ import annotations

import base64
import hashlib
import logging
import re
import time
import uuid
from collections.abc import Awaitable, Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from types import TracebackType
from typing import Any, Final, Literal, TypeGuard

import anyio
import httpx

from keystrata_client._errors import ApiError, KeystrataClientError, TransportError
from keystrata_client._http import (
    build_async_client,
    build_client,
    check_base_url,
    json_object,
    path_segment,
    wrap_transport,
)
from keystrata_client._tls import TlsIdentity

__all__ = [
    "BASE_PATH",
    "AsyncKeyClient",
    "Key",
    "KeyClient",
    "KeyContainer",
    "KeyStatus",
    "RequestForm",
    "UncertainDeliveryError",
    "is_key_id",
]

logger = logging.getLogger("keystrata_client.keys")

#: Base path of the key delivery API (ETSI GS QKD 014 V1.1.1).
BASE_PATH: Final = "/api/v1/keys"
#: Longest single wait between two attempts, in seconds.
MAX_BACKOFF: Final = 5.0

#: ``"post"`` sends a JSON body; ``"get"`` puts the arguments in the query string.
RequestForm = Literal["post", "get"]

# Raised before a single byte of the request is written: safe to send again, whatever
# the request does at the node.
_NOT_SENT: Final = (httpx.ConnectError, httpx.ConnectTimeout, httpx.PoolTimeout)

# RFC 9562 section 4: 8-4-4-4-12 hexadecimal digits; input may be either case.
_UUID_TEXT: Final = re.compile(
    r"[0-9a-fA-F]{8}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{12}"
)


class UncertainDeliveryError(TransportError):
    """A key call lost its answer after the request may have reached the node.

    The node may have allocated the keys (enc_keys) or handed them out and destroyed
    them (dec_keys); the caller cannot know. The SDK does not send such a request again.
    The ``httpx`` exception is chained as ``__cause__``.
    """


# -- results -----------------------------------------------------------------------------


def _bad(what: str, problem: str) -> KeystrataClientError:
    return KeystrataClientError(f"{what}: invalid answer: {problem}")


def _integer(obj: Mapping[str, Any], name: str, what: str) -> int:
    value = obj.get(name)
    # bool is an int in Python; JSON true is not a count.
    if not isinstance(value, int) or isinstance(value, bool) or value < 0:
        raise _bad(what, f"{name} is not a non-negative integer")
    return value


def _text(obj: Mapping[str, Any], name: str, what: str) -> str:
    value = obj.get(name)
    if not isinstance(value, str) or not value:
        raise _bad(what, f"{name} is not a non-empty string")
    return value


def _extension(obj: Mapping[str, Any], name: str, what: str) -> dict[str, Any] | None:
    value = obj.get(name)
    if value is None:
        return None
    if not isinstance(value, dict):
        raise _bad(what, f"{name} is not an object")
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
    """The Status object: what a master SAE can ask of its node for one slave SAE.

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
        what = "status"
        values: dict[str, Any] = {}
        for attr, name in _STATUS_FIELDS:
            if attr.endswith("_id"):
                values[attr] = _text(obj, name, what)
            else:
                values[attr] = _integer(obj, name, what)
        return cls(**values, status_extension=_extension(obj, "status_extension", what))

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


def _decode_key(text: object, what: str, index: int) -> bytes:
    """Return the bytes of a Base64 ``key``; errors never repeat the text."""
    if not isinstance(text, str) or not text:
        raise _bad(what, f"keys[{index}].key is not a non-empty string")
    try:
        # validate=True refuses characters outside the RFC 4648 section 4 alphabet
        # instead of skipping them; a non-ASCII str raises ValueError too.
        raw = base64.b64decode(text, validate=True)
    except ValueError:
        raise _bad(what, f"keys[{index}].key is not Base64 (RFC 4648 section 4)") from None
    # RFC 4648 section 3.5: a decoder may refuse non-zero pad bits; one key has one text.
    if base64.b64encode(raw).decode("ascii") != text:
        raise _bad(what, f"keys[{index}].key is not canonical Base64 (RFC 4648 section 3.5)")
    if not raw:
        raise _bad(what, f"keys[{index}].key is empty")
    return raw


def _container(answer: Mapping[str, Any], what: str) -> KeyContainer:
    raw_keys = answer.get("keys")
    if not isinstance(raw_keys, list) or not raw_keys:
        raise _bad(what, "keys is not a non-empty list")
    keys: list[Key] = []
    seen: set[uuid.UUID] = set()
    for index, item in enumerate(raw_keys):
        if not isinstance(item, dict):
            raise _bad(what, f"keys[{index}] is not an object")
        key_id = item.get("key_ID")
        if not is_key_id(key_id):
            raise _bad(what, f"keys[{index}].key_ID is not a UUID (RFC 9562 section 4)")
        if uuid.UUID(key_id) in seen:
            raise _bad(what, f"key_ID {key_id} appears twice")
        seen.add(uuid.UUID(key_id))
        keys.append(
            Key(
                key_id=key_id,
                key=_decode_key(item.get("key"), what, index),
                key_id_extension=_extension(item, "key_ID_extension", what),
                key_extension=_extension(item, "key_extension", what),
            )
        )
    return KeyContainer(tuple(keys), _extension(answer, "key_container_extension", what))


def _check_enc_answer(container: KeyContainer, number: int, size: int | None) -> KeyContainer:
    what = "enc_keys"
    if len(container) != number:
        raise _bad(what, f"{len(container)} keys for a request of {number}")
    for key in container:
        if size is not None and key.size != size:
            raise _bad(what, f"key {key.key_id} has {key.size} bits, not {size}")
    return container


def _check_dec_answer(container: KeyContainer, key_ids: Sequence[str]) -> KeyContainer:
    asked = {uuid.UUID(k) for k in key_ids}
    got = {uuid.UUID(k) for k in container.key_ids}
    if got != asked:
        missing = sorted(str(k) for k in asked - got)
        extra = sorted(str(k) for k in got - asked)
        raise _bad(
            "dec_keys", f"key IDs differ from the request (missing {missing}, extra {extra})"
        )
    return container


# -- requests ----------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Call:
    """One request, and whether it may be sent again after the request left."""

    what: str
    method: str
    path: str
    idempotent: bool
    params: dict[str, str | int] | None = None
    body: dict[str, Any] | None = None


def _status_call(slave_sae_id: str) -> _Call:
    return _Call("status", "GET", f"{BASE_PATH}/{path_segment(slave_sae_id)}/status", True)


def _sae_ids(values: Iterable[str], name: str) -> list[str]:
    out = list(values)
    if isinstance(values, str) or not all(isinstance(v, str) and v for v in out):
        raise ValueError(f"{name} must be a sequence of non-empty SAE IDs")
    return out


def _enc_call(
    slave_sae_id: str,
    number: int,
    size: int | None,
    additional_slave_sae_ids: Iterable[str],
    extension_mandatory: Sequence[Mapping[str, Any]],
    extension_optional: Sequence[Mapping[str, Any]],
    form: RequestForm,
) -> _Call:
    if not isinstance(number, int) or isinstance(number, bool) or number < 1:
        raise ValueError("number must be a positive integer")
    if size is not None and (
        not isinstance(size, int) or isinstance(size, bool) or size < 8 or size % 8
    ):
        raise ValueError("size is in bits: a positive multiple of 8")
    additional = _sae_ids(additional_slave_sae_ids, "additional_slave_sae_ids")
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
        return _Call("enc_keys", "GET", path, False, params=params)
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
    return _Call("enc_keys", "POST", path, False, body=body)


def _key_id_list(key_ids: Iterable[str]) -> list[str]:
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


def _dec_call(master_sae_id: str, ids: list[str], form: RequestForm) -> _Call:
    path = f"{BASE_PATH}/{path_segment(master_sae_id)}/dec_keys"
    if form == "get":
        if len(ids) != 1:
            raise ValueError("the GET form carries exactly one key_ID; use form='post'")
        return _Call("dec_keys", "GET", path, False, params={"key_ID": ids[0]})
    if form != "post":
        raise ValueError("form must be 'post' or 'get'")
    body = {"key_IDs": [{"key_ID": k} for k in ids]}
    return _Call("dec_keys", "POST", path, False, body=body)


def _retry_transport(call: _Call, exc: httpx.HTTPError) -> bool:
    """Return True when ``call`` may be sent again after ``exc``."""
    if isinstance(exc, _NOT_SENT):
        return True
    return call.idempotent and isinstance(exc, httpx.TransportError)


def _transport_error(call: _Call, exc: httpx.HTTPError) -> KeystrataClientError:
    # UnsupportedProtocol: the URL's scheme was refused before any connection.
    if call.idempotent or isinstance(exc, (*_NOT_SENT, httpx.UnsupportedProtocol)):
        return wrap_transport(exc)
    # Anything else (read timeout, reset, protocol error, an answer that could not be
    # decoded) may come after the node acted on the request.
    effect = "allocated" if call.what == "enc_keys" else "delivered and destroyed"
    return UncertainDeliveryError(
        f"{call.what}: {type(exc).__name__} after the request may have reached the node; "
        f"the keys may have been {effect} (not sent again)"
    )


def _delay(backoff: float, attempt: int) -> float:
    return float(min(MAX_BACKOFF, backoff * 2**attempt))


def _check_attempts(attempts: int, backoff: float) -> None:
    if attempts < 1:
        raise ValueError("attempts must be at least 1")
    if backoff < 0:
        raise ValueError("backoff must not be negative")


class KeyClient:
    """Synchronous ETSI GS QKD 014 client of one SAE at its station's node.

    Args:
        base_url: the node's URL, e.g. ``https://station-a.example:8443``.
        identity: the SAE's certificate files; used only when ``client`` is None.
        client: an ``httpx.Client`` to send through (the caller keeps ownership and
            closes it; its TLS settings apply). Default: one built from ``identity``
            and closed by :meth:`close`.
        timeout: seconds, for the client built here.
        attempts: how many times a request is sent at most, where a retry is safe
            (see the module docstring); 1 = never retry.
        backoff: seconds before the first retry, doubled for each further one, capped
            at :data:`MAX_BACKOFF`.
        sleep: the function that waits (tests pass a fake).

    Every call raises:
        ApiError: the node answered with a non-2xx status (400 bad request format,
            401 unauthorized or unknown key, 503 error on the node's side).
        UncertainDeliveryError: a key call lost its answer after the request may have
            reached the node (see the module docstring).
        TransportError: no answer, and nothing happened at the node (or the call was
            ``status``, which changes nothing).
        KeystrataClientError: the answer is not a valid Status or Key container.
        ValueError: an argument is invalid; nothing was sent.

    Raises:
        ValueError: ``attempts`` < 1 or a negative ``backoff``.
    """

    def __init__(
        self,
        base_url: str,
        identity: TlsIdentity | None = None,
        *,
        client: httpx.Client | None = None,
        timeout: float = 10.0,
        attempts: int = 3,
        backoff: float = 0.2,
        sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        _check_attempts(attempts, backoff)
        self.base_url = check_base_url(base_url)
        self.attempts = attempts
        self.backoff = backoff
        self._sleep = sleep
        self._owns_client = client is None
        self._client = client if client is not None else build_client(identity, timeout)

    def __repr__(self) -> str:
        return f"KeyClient({self.base_url!r})"

    def close(self) -> None:
        """Close the HTTP client if this object created it; return None."""
        if self._owns_client:
            self._client.close()

    def __enter__(self) -> KeyClient:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    def _send(self, call: _Call) -> dict[str, Any]:
        for attempt in range(self.attempts):
            last = attempt + 1 >= self.attempts
            try:
                response = self._client.request(
                    call.method, self.base_url + call.path, params=call.params, json=call.body
                )
            except httpx.HTTPError as exc:
                if last or not _retry_transport(call, exc):
                    raise _transport_error(call, exc) from exc
                logger.info("%s: %s, sending again", call.what, type(exc).__name__)
            else:
                try:
                    return json_object(response)
                except ApiError as exc:
                    if last or not (call.idempotent and exc.retryable):
                        raise
                    logger.info("%s: HTTP %d, sending again", call.what, exc.status)
            self._sleep(_delay(self.backoff, attempt))
        raise AssertionError("unreachable")  # pragma: no cover

    def status(self, slave_sae_id: str) -> KeyStatus:
        """Return the Status for keys shared with ``slave_sae_id`` (Get status).

        Sent again after a transport error or a 503, up to ``attempts`` times.
        """
        return KeyStatus.from_json(self._send(_status_call(slave_sae_id)))

    def get_keys(
        self,
        slave_sae_id: str,
        number: int = 1,
        size: int | None = None,
        additional_slave_sae_ids: Iterable[str] = (),
        *,
        extension_mandatory: Sequence[Mapping[str, Any]] = (),
        extension_optional: Sequence[Mapping[str, Any]] = (),
        form: RequestForm = "post",
    ) -> KeyContainer:
        """Return ``number`` new keys shared with ``slave_sae_id`` (Get key, enc_keys).

        ``size`` is in bits (a multiple of 8); None lets the node use its default
        ``key_size``. The GET form carries only ``number`` and ``size``. Sent again only
        when the connection was never established: see the module docstring.
        """
        call = _enc_call(
            slave_sae_id,
            number,
            size,
            additional_slave_sae_ids,
            extension_mandatory,
            extension_optional,
            form,
        )
        return _check_enc_answer(_container(self._send(call), call.what), number, size)

    def get_keys_with_ids(
        self, master_sae_id: str, key_ids: Iterable[str], *, form: RequestForm = "post"
    ) -> KeyContainer:
        """Return the keys ``master_sae_id`` obtained under ``key_ids`` (dec_keys).

        The node serves each key once. The GET form takes exactly one key ID. Sent again
        only when the connection was never established: see the module docstring.
        """
        ids = _key_id_list(key_ids)
        call = _dec_call(master_sae_id, ids, form)
        return _check_dec_answer(_container(self._send(call), call.what), ids)


class AsyncKeyClient:
    """Asynchronous twin of :class:`KeyClient` on ``httpx.AsyncClient``.

    Same arguments and retry rules, except ``client`` is an ``httpx.AsyncClient`` and
    ``sleep`` a coroutine function (default ``anyio.sleep``: asyncio or trio). Close it
    with ``await aclose()`` or ``async with``.
    """

    def __init__(
        self,
        base_url: str,
        identity: TlsIdentity | None = None,
        *,
        client: httpx.AsyncClient | None = None,
        timeout: float = 10.0,
        attempts: int = 3,
        backoff: float = 0.2,
        sleep: Callable[[float], Awaitable[None]] = anyio.sleep,
    ) -> None:
        _check_attempts(attempts, backoff)
        self.base_url = check_base_url(base_url)
        self.attempts = attempts
        self.backoff = backoff
        self._sleep = sleep
        self._owns_client = client is None
        self._client = client if client is not None else build_async_client(identity, timeout)

    def __repr__(self) -> str:
        return f"AsyncKeyClient({self.base_url!r})"

    async def aclose(self) -> None:
        """Close the HTTP client if this object created it; return None."""
        if self._owns_client:
            await self._client.aclose()

    async def __aenter__(self) -> AsyncKeyClient:
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        await self.aclose()

    async def _send(self, call: _Call) -> dict[str, Any]:
        for attempt in range(self.attempts):
            last = attempt + 1 >= self.attempts
            try:
                response = await self._client.request(
                    call.method, self.base_url + call.path, params=call.params, json=call.body
                )
            except httpx.HTTPError as exc:
                if last or not _retry_transport(call, exc):
                    raise _transport_error(call, exc) from exc
                logger.info("%s: %s, sending again", call.what, type(exc).__name__)
            else:
                try:
                    return json_object(response)
                except ApiError as exc:
                    if last or not (call.idempotent and exc.retryable):
                        raise
                    logger.info("%s: HTTP %d, sending again", call.what, exc.status)
            await self._sleep(_delay(self.backoff, attempt))
        raise AssertionError("unreachable")  # pragma: no cover

    async def status(self, slave_sae_id: str) -> KeyStatus:
        """Return the Status for ``slave_sae_id``; see :meth:`KeyClient.status`."""
        return KeyStatus.from_json(await self._send(_status_call(slave_sae_id)))

    async def get_keys(
        self,
        slave_sae_id: str,
        number: int = 1,
        size: int | None = None,
        additional_slave_sae_ids: Iterable[str] = (),
        *,
        extension_mandatory: Sequence[Mapping[str, Any]] = (),
        extension_optional: Sequence[Mapping[str, Any]] = (),
        form: RequestForm = "post",
    ) -> KeyContainer:
        """Return ``number`` new keys for ``slave_sae_id``; see :meth:`KeyClient.get_keys`."""
        call = _enc_call(
            slave_sae_id,
            number,
            size,
            additional_slave_sae_ids,
            extension_mandatory,
            extension_optional,
            form,
        )
        return _check_enc_answer(_container(await self._send(call), call.what), number, size)

    async def get_keys_with_ids(
        self, master_sae_id: str, key_ids: Iterable[str], *, form: RequestForm = "post"
    ) -> KeyContainer:
        """Return the keys under ``key_ids``; see :meth:`KeyClient.get_keys_with_ids`."""
        ids = _key_id_list(key_ids)
        call = _dec_call(master_sae_id, ids, form)
        return _check_dec_answer(_container(await self._send(call), call.what), ids)
