"""Plumbing shared by the clients: building httpx clients, sending, reading answers.

Everything that turns an ``httpx`` exception or a non-2xx answer into the SDK's error
tree lives here, so the public clients only say which request to make.
"""

from __future__ import annotations

from typing import Any
from urllib.parse import quote

import httpx

from keystrata_client._errors import ApiError, KeystrataClientError, TransportError
from keystrata_client._tls import TlsIdentity

USER_AGENT = "keystrata-client/0.1"


def check_base_url(base_url: str) -> str:
    """Return ``base_url`` without a trailing slash.

    Raises:
        ValueError: the URL is not http:// or https://.
    """
    if not base_url.startswith(("https://", "http://")):
        raise ValueError("base_url must start with https:// (or http:// for tests)")
    return base_url.rstrip("/")


def _verify(identity: TlsIdentity | None) -> Any:
    return identity.ssl_context() if identity is not None else True


def build_client(identity: TlsIdentity | None, timeout: float) -> httpx.Client:
    """Return a new synchronous client that authenticates with ``identity``.

    Without an identity, server certificates are checked against the system store and
    no client certificate is sent (keystrata nodes will refuse such a caller).
    """
    return httpx.Client(
        verify=_verify(identity), timeout=timeout, headers={"User-Agent": USER_AGENT}
    )


def build_async_client(identity: TlsIdentity | None, timeout: float) -> httpx.AsyncClient:
    """Return a new asynchronous client; see :func:`build_client`."""
    return httpx.AsyncClient(
        verify=_verify(identity), timeout=timeout, headers={"User-Agent": USER_AGENT}
    )


def wrap_transport(exc: httpx.HTTPError) -> KeystrataClientError:
    """Return the SDK error for an ``httpx`` exception raised before any answer."""
    name = type(exc).__name__
    if isinstance(exc, httpx.TransportError):
        # str(exc) names the failure (refused, timed out, certificate verify failed);
        # httpx never puts the request body into it.
        return TransportError(f"{name}: {exc}" if str(exc) else name)
    return KeystrataClientError(f"request failed: {name}")


def check_answer(response: httpx.Response) -> None:
    """Return when ``response`` is 2xx.

    Raises:
        ApiError: any other status; carries the server's ``message`` and ``details``
            when the body is the JSON error object, else the reason phrase.
    """
    if response.is_success:
        return
    message = response.reason_phrase or f"HTTP {response.status_code}"
    details: list[dict[str, Any]] = []
    try:
        body = response.json()
    except ValueError:
        body = None
    if isinstance(body, dict):
        if isinstance(body.get("message"), str):
            message = body["message"]
        raw = body.get("details")
        if isinstance(raw, list):
            details = [d for d in raw if isinstance(d, dict)]
    raise ApiError(response.status_code, message, details)


def json_object(response: httpx.Response) -> dict[str, Any]:
    """Return the JSON object in a 2xx ``response``.

    Raises:
        ApiError: the status is not 2xx.
        KeystrataClientError: the body is not a JSON object.
    """
    check_answer(response)
    try:
        body = response.json()
    except ValueError as exc:
        raise KeystrataClientError(
            f"{response.request.method} {response.request.url.path}: answer is not JSON"
        ) from exc
    if not isinstance(body, dict):
        raise KeystrataClientError(
            f"{response.request.method} {response.request.url.path}: answer is not a JSON object"
        )
    return body


def path_segment(value: str) -> str:
    """Quote an identifier as one URL path segment.

    Raises:
        ValueError: empty, ``.`` or ``..``, which a URL would resolve as a path step
            rather than send as a name (node identifiers never look like that).
    """
    if value in ("", ".", ".."):
        raise ValueError(f"{value!r} is not a usable identifier")
    return quote(value, safe="")
