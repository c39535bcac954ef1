"""QKD module calls: push link key blocks to one end of a QKD link.

A push is idempotent on the server: a block ID re-sent with identical bytes counts as a
duplicate, not as new key. So a push whose answer was lost can simply be sent again;
these clients do that on a :class:`TransportError` or a 503, a bounded number of times
with a short exponential backoff. A 4xx answer is never retried: the same request would
get the same answer.
"""

from __future__ import annotations

import json
import time
from collections.abc import Awaitable, Callable, Iterable
from dataclasses import dataclass
from types import TracebackType

import anyio
import httpx

from keystrata_client._blocks import BINARY_MEDIA_TYPE, LinkBlock, encode_binary, to_json
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

#: Longest single wait between two attempts, in seconds.
MAX_BACKOFF = 5.0


@dataclass(frozen=True, slots=True)
class IngestResult:
    """What one end of the link did with a push.

    Attributes:
        link_id: the link the blocks were pushed for.
        accepted: blocks stored as new key.
        duplicates: blocks the node already held with identical bytes.
        accepted_bits: key bits added to the pool by the accepted blocks.
    """

    link_id: str
    accepted: int
    duplicates: int
    accepted_bits: int


def _prepare(
    link_id: str, blocks: Iterable[LinkBlock], binary: bool
) -> tuple[str, bytes, dict[str, str], int]:
    """Return the path, body, headers and block count of a push."""
    batch = list(blocks)
    path = f"/api/v1/links/{path_segment(link_id)}/blocks"
    if binary:
        return path, encode_binary(batch), {"Content-Type": BINARY_MEDIA_TYPE}, len(batch)
    body = json.dumps(to_json(batch), separators=(",", ":")).encode("ascii")
    return path, body, {"Content-Type": "application/json"}, len(batch)


def _count(answer: dict[str, object], name: str, link_id: str) -> int:
    value = answer.get(name)
    if not isinstance(value, int) or isinstance(value, bool) or value < 0:
        raise KeystrataClientError(f"push to link {link_id}: answer lacks a count {name!r}")
    return value


def _result(link_id: str, response: httpx.Response) -> IngestResult:
    answer = json_object(response)
    return IngestResult(
        link_id=str(answer.get("link_id", link_id)),
        accepted=_count(answer, "accepted", link_id),
        duplicates=_count(answer, "duplicates", link_id),
        accepted_bits=_count(answer, "accepted_bits", link_id),
    )


def _should_retry(exc: KeystrataClientError) -> bool:
    return isinstance(exc, TransportError) or (isinstance(exc, ApiError) and exc.retryable)


def _delay(backoff: float, attempt: int) -> float:
    return float(min(MAX_BACKOFF, backoff * 2**attempt))


def _check_attempts(attempts: int, backoff: float) -> None:
    if attempts < 1:
        raise ValueError("attempts must be at least 1")
    if backoff < 0:
        raise ValueError("backoff must not be negative")


class ModuleClient:
    """Synchronous client with which a QKD module pushes blocks to one node.

    Args:
        base_url: the node's URL (relay or station end of the link).
        identity: the module's certificate files; used only when ``client`` is None.
        client: an ``httpx.Client`` to send through (caller-owned). Default: one built
            from ``identity`` and closed by :meth:`close`.
        timeout: seconds, for the client built here.
        attempts: how many times a push is sent at most (1 = no retry).
        backoff: seconds before the first retry; doubled for each further one, capped
            at :data:`MAX_BACKOFF`.
        sleep: the function that waits (tests pass a fake).

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
        return f"ModuleClient({self.base_url!r})"

    def close(self) -> None:
        """Close the HTTP client if this object created it; return None."""
        if self._owns_client:
            self._client.close()

    def __enter__(self) -> ModuleClient:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    def push_blocks(
        self, link_id: str, blocks: Iterable[LinkBlock], *, binary: bool = True
    ) -> IngestResult:
        """Push ``blocks`` for ``link_id`` and return the node's counts.

        An empty ``blocks`` returns zero counts without contacting the node.

        Raises:
            ApiError: a non-2xx answer other than 503, or 503 on the last attempt
                (400 bad input, 401/403 auth, 404 unknown link, 409 a block ID re-sent
                with different bytes, 413 batch too large).
            TransportError: no answer on the last attempt.
            KeystrataClientError: the answer could not be read.
        """
        path, body, headers, count = _prepare(link_id, blocks, binary)
        if count == 0:
            return IngestResult(link_id, 0, 0, 0)
        for attempt in range(self.attempts):
            try:
                try:
                    response = self._client.post(
                        self.base_url + path, content=body, headers=headers
                    )
                except httpx.HTTPError as exc:
                    raise wrap_transport(exc) from exc
                return _result(link_id, response)
            except KeystrataClientError as exc:
                if attempt + 1 >= self.attempts or not _should_retry(exc):
                    raise
            self._sleep(_delay(self.backoff, attempt))
        raise AssertionError("unreachable")  # pragma: no cover


class AsyncModuleClient:
    """Asynchronous twin of :class:`ModuleClient` on ``httpx.AsyncClient``.

    Same arguments, except ``client`` is an ``httpx.AsyncClient`` and ``sleep`` is a
    coroutine function (default ``anyio.sleep``, so it runs on asyncio or trio).
    Close it with ``await aclose()`` or ``async with``.
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
        return f"AsyncModuleClient({self.base_url!r})"

    async def aclose(self) -> None:
        """Close the HTTP client if this object created it; return None."""
        if self._owns_client:
            await self._client.aclose()

    async def __aenter__(self) -> AsyncModuleClient:
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        await self.aclose()

    async def push_blocks(
        self, link_id: str, blocks: Iterable[LinkBlock], *, binary: bool = True
    ) -> IngestResult:
        """Push ``blocks`` for ``link_id`` and return the node's counts.

        Raises:
            ApiError, TransportError, KeystrataClientError: as
                :meth:`ModuleClient.push_blocks`.
        """
        path, body, headers, count = _prepare(link_id, blocks, binary)
        if count == 0:
            return IngestResult(link_id, 0, 0, 0)
        for attempt in range(self.attempts):
            try:
                try:
                    response = await self._client.post(
                        self.base_url + path, content=body, headers=headers
                    )
                except httpx.HTTPError as exc:
                    raise wrap_transport(exc) from exc
                return _result(link_id, response)
            except KeystrataClientError as exc:
                if attempt + 1 >= self.attempts or not _should_retry(exc):
                    raise
            await self._sleep(_delay(self.backoff, attempt))
        raise AssertionError("unreachable")  # pragma: no cover
