"""The asynchronous ETSI GS QKD 014 client of one SAE: :class:`AsyncKeyClient`.

The twin of :class:`~keystrata_client._key_client.KeyClient` on ``httpx.AsyncClient``;
requests, answer checks and retry rules come from the same sans-IO core (``_keys`` and
``_key_answers``).
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable, Iterable, Mapping, Sequence
from types import TracebackType
from typing import Any

import anyio
import httpx

from keystrata_client._errors import ApiError
from keystrata_client._http import build_async_client, check_base_url, json_object
from keystrata_client._key_answers import (
    KeyContainer,
    KeyStatus,
    check_dec_answer,
    check_enc_answer,
    parse_container,
)
from keystrata_client._keys import (
    KeyRequest,
    RequestForm,
    backoff_delay,
    check_retry_settings,
    dec_keys_request,
    enc_keys_request,
    key_id_list,
    logger,
    may_resend_after_answer,
    may_resend_after_transport,
    status_request,
    transport_failure,
)
from keystrata_client._tls import TlsIdentity


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
        check_retry_settings(attempts, backoff)
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

    async def _send(self, request: KeyRequest) -> dict[str, Any]:
        for attempt in range(self.attempts):
            last = attempt + 1 >= self.attempts
            try:
                response = await self._client.request(
                    request.method,
                    self.base_url + request.path,
                    params=request.params,
                    json=request.body,
                )
            except httpx.HTTPError as exc:
                if last or not may_resend_after_transport(request, exc):
                    raise transport_failure(request, exc) from exc
                logger.info("%s: %s, sending again", request.call_name, type(exc).__name__)
            else:
                try:
                    return json_object(response)
                except ApiError as exc:
                    if last or not may_resend_after_answer(request, exc):
                        raise
                    logger.info("%s: HTTP %d, sending again", request.call_name, exc.status)
            await self._sleep(backoff_delay(self.backoff, attempt))
        raise AssertionError("unreachable")  # pragma: no cover

    async def status(self, slave_sae_id: str) -> KeyStatus:
        """Return the Status for ``slave_sae_id``; see :meth:`KeyClient.status`."""
        return KeyStatus.from_json(await self._send(status_request(slave_sae_id)))

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
        request = enc_keys_request(
            slave_sae_id,
            number,
            size,
            additional_slave_sae_ids,
            extension_mandatory,
            extension_optional,
            form,
        )
        answer = parse_container(await self._send(request), request.call_name)
        return check_enc_answer(answer, number, size)

    async def get_keys_with_ids(
        self, master_sae_id: str, key_ids: Iterable[str], *, form: RequestForm = "post"
    ) -> KeyContainer:
        """Return the keys under ``key_ids``; see :meth:`KeyClient.get_keys_with_ids`."""
        ids = key_id_list(key_ids)
        request = dec_keys_request(master_sae_id, ids, form)
        answer = parse_container(await self._send(request), request.call_name)
        return check_dec_answer(answer, ids)
