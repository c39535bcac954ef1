"""The synchronous ETSI GS QKD 014 client of one SAE: :class:`KeyClient`.

Requests, answer checks and retry rules come from the sans-IO core (``_keys`` and
``_key_answers``); this module only sends them over an ``httpx.Client``.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from types import TracebackType
from typing import Any

import httpx

from keystrata_client._errors import ApiError
from keystrata_client._http import build_client, check_base_url, json_object
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
            (see ``keystrata_client._keys``); 1 = never retry.
        backoff: seconds before the first retry, doubled for each further one, capped
            at :data:`~keystrata_client._keys.MAX_BACKOFF`.
        sleep: the function that waits (tests pass a fake).

    Every call raises:
        ApiError: the node answered with a non-2xx status (400 bad request format,
            401 unauthorized or unknown key, 503 error on the node's side).
        UncertainDeliveryError: a key call lost its answer after the request may have
            reached the node (see ``keystrata_client._keys``).
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
        check_retry_settings(attempts, backoff)
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

    def _send(self, request: KeyRequest) -> dict[str, Any]:
        for attempt in range(self.attempts):
            last = attempt + 1 >= self.attempts
            try:
                response = self._client.request(
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
            self._sleep(backoff_delay(self.backoff, attempt))
        raise AssertionError("unreachable")  # pragma: no cover

    def status(self, slave_sae_id: str) -> KeyStatus:
        """Return the Status for keys shared with ``slave_sae_id`` (Get status).

        Sent again after a transport error or a 503, up to ``attempts`` times.
        """
        return KeyStatus.from_json(self._send(status_request(slave_sae_id)))

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
        when the connection was never established: see ``keystrata_client._keys``.
        """
        request = enc_keys_request(
            slave_sae_id,
            number,
            size,
            additional_slave_sae_ids,
            extension_mandatory,
            extension_optional,
            form,
        )
        answer = parse_container(self._send(request), request.call_name)
        return check_enc_answer(answer, number, size)

    def get_keys_with_ids(
        self, master_sae_id: str, key_ids: Iterable[str], *, form: RequestForm = "post"
    ) -> KeyContainer:
        """Return the keys ``master_sae_id`` obtained under ``key_ids`` (dec_keys).

        The node serves each key once. The GET form takes exactly one key ID. Sent again
        only when the connection was never established: see ``keystrata_client._keys``.
        """
        ids = key_id_list(key_ids)
        request = dec_keys_request(master_sae_id, ids, form)
        answer = parse_container(self._send(request), request.call_name)
        return check_dec_answer(answer, ids)
