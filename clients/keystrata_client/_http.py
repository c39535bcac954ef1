"""Plumbing shared by the clients: building httpx clients, sending, reading answers.

Everything that turns an ``httpx`` exception or a non-2xx answer into the SDK's error
tree lives here, so the public clients only say which request to make.
"""

from __future__ import annotations

import ssl
from typing import Any
from urllib.parse import quote, urlsplit

import httpx

from keystrata_client._errors import (
    ApiError,
    ConnectionProblem,
    KeystrataClientError,
    TransportError,
)
from keystrata_client._tls import TlsIdentity

USER_AGENT = "keystrata-client/0.1"


def check_base_url(base_url: str) -> str:
    """Return ``base_url`` without a trailing slash.

    Raises:
        ValueError: the URL is not http:// or https://.
        ConnectionProblem: the URL has a path, a query or a fragment: the clients add
            the API's paths to the node's base URL themselves.
    """
    if not base_url.startswith(("https://", "http://")):
        raise ValueError(
            f"{base_url!r} is not a node URL: it must start with https:// "
            "(or http:// for tests), e.g. https://relay.example:8443"
        )
    parts = urlsplit(base_url)
    if parts.path.strip("/") or parts.query or parts.fragment:
        found = parts.path + (f"?{parts.query}" if parts.query else "")
        raise ConnectionProblem(
            f"{base_url} is not a node's base URL: it has the path {found!r}",
            f"give the base URL only, {parts.scheme}://{parts.netloc}",
        )
    return base_url.rstrip("/")


def _verify(identity: TlsIdentity | None) -> Any:
    return identity.checked_ssl_context() if identity is not None else True


def build_client(identity: TlsIdentity | None, timeout: float) -> httpx.Client:
    """Return a new synchronous client that authenticates with ``identity``.

    Without an identity, server certificates are checked against the system store and
    no client certificate is sent (keystrata nodes will refuse such a caller).

    Raises:
        ConnectionProblem: a file of ``identity`` cannot be used.
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
    """Return the SDK error for an ``httpx`` exception raised before any answer: a
    :class:`ConnectionProblem` (one sentence and a hint) when the cause is one the SDK
    recognises, else a :class:`TransportError` naming the exception."""
    name = type(exc).__name__
    if isinstance(exc, httpx.TransportError):
        recognised = explain_transport(exc)
        if recognised is not None:
            return recognised
        # str(exc) names the failure (refused, timed out, certificate verify failed);
        # httpx never puts the request body into it.
        return TransportError(f"{name}: {exc}" if str(exc) else name)
    return KeystrataClientError(f"request failed: {name}")


_HANDSHAKE_ALERTS = (
    "ALERT_CERTIFICATE_REQUIRED",
    "ALERT_BAD_CERTIFICATE",
    "ALERT_UNKNOWN_CA",
    "ALERT_CERTIFICATE_REVOKED",
    "ALERT_CERTIFICATE_EXPIRED",
    "ALERT_CERTIFICATE_UNKNOWN",
    "ALERT_HANDSHAKE_FAILURE",
    "ALERT_ACCESS_DENIED",
)
_REFUSED_HINT = (
    "a node takes only client certificates issued by its network's CA, not expired and "
    "not revoked (`keystrata pki show FILE` prints a certificate's issuer and dates)"
)


def explain_transport(exc: httpx.TransportError) -> ConnectionProblem | None:
    """Return the sentence for a transport failure whose cause is recognisable, else
    None. It names the node's scheme, host and port, never the path or a body."""
    try:
        url = exc.request.url
    except RuntimeError:  # an exception raised without its request
        return None
    where = f"{url.scheme}://{url.host}:{url.port or (443 if url.scheme == 'https' else 80)}"
    text = str(exc)
    cause = _ssl_cause(exc)
    if url.scheme == "http" and isinstance(
        exc, (httpx.RemoteProtocolError, httpx.ReadError, httpx.WriteError)
    ):
        return ConnectionProblem(
            f"the node at {where} closed the connection without an answer: keystrata nodes "
            "speak HTTPS only",
            f"use {where.replace('http://', 'https://', 1)}",
        )
    if isinstance(cause, ssl.SSLCertVerificationError) or "CERTIFICATE_VERIFY_FAILED" in text:
        detail = getattr(cause, "verify_message", "") or "certificate verify failed"
        return ConnectionProblem(
            f"the server at {where} presented a certificate the CA file does not verify ({detail})",
            "give the CA certificate of the node's network, and a URL with a host name or "
            "address the node's certificate names (`keystrata pki show NODE.crt` lists them)",
        )
    if any(alert in text for alert in _HANDSHAKE_ALERTS):
        return ConnectionProblem(
            f"the node at {where} refused the TLS handshake ({_reason(cause, text)})",
            _REFUSED_HINT,
        )
    if isinstance(exc, httpx.ConnectError):
        if "refused" in text.lower():
            return ConnectionProblem(
                f"nothing accepts connections at {where} (connection refused)",
                "check the URL's host and port, and that the node is running",
            )
        if "Name or service not known" in text or "nodename nor servname" in text:
            return ConnectionProblem(
                f"the host name {url.host} does not resolve", "check the URL's host name"
            )
        if isinstance(cause, ssl.SSLError) and "WRONG_VERSION_NUMBER" in text:
            return ConnectionProblem(
                f"the server at {where} does not speak TLS",
                f"use the node's HTTPS port, not {where}",
            )
        return None
    if isinstance(exc, httpx.ConnectTimeout):
        return ConnectionProblem(
            f"no connection to {where} within the timeout",
            "check the URL's host and port, and that nothing between you and the node drops it",
        )
    if url.scheme == "https" and isinstance(exc, (httpx.RemoteProtocolError, httpx.ReadError)):
        return ConnectionProblem(
            f"the node at {where} closed the connection without an answer (it may be "
            "stopping or restarting, or it refused the client certificate)",
            "try again in a moment; if it goes on, " + _REFUSED_HINT,
        )
    return None


def _ssl_cause(exc: BaseException) -> BaseException | None:
    """The ``ssl`` exception under an ``httpx`` one, if any (httpcore chains them)."""
    seen: BaseException | None = exc
    for _ in range(6):
        if seen is None or isinstance(seen, ssl.SSLError):
            return seen
        seen = seen.__cause__ or seen.__context__
    return None


def _reason(cause: BaseException | None, text: str) -> str:
    reason = getattr(cause, "reason", None)
    if isinstance(reason, str) and reason:
        return reason.lower().replace("_", " ")
    return text[:120]


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
