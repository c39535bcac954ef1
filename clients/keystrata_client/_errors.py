"""The client's error tree.

Every error the SDK raises on purpose derives from :class:`KeystrataClientError`.
Messages never carry key material: an :class:`ApiError` repeats the server's own safe
message, and a :class:`TransportError` names the failure, not the request body.

    KeystrataClientError        base; also raised for an answer the SDK cannot read
    ├── ApiError                the server answered with a non-2xx status
    └── TransportError          no answer: connection refused, TLS failure, timeout
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any


class KeystrataClientError(Exception):
    """Base of every error raised by ``keystrata_client``."""


class ApiError(KeystrataClientError):
    """The server answered with a status outside 2xx.

    Attributes:
        status: the HTTP status code.
        message: the server's ``message`` (safe to show), or the reason phrase when the
            body was not the JSON error object.
        details: the server's ``details`` list (objects naming fields and problems).
    """

    def __init__(
        self,
        status: int,
        message: str,
        details: Sequence[Mapping[str, Any]] | None = None,
    ) -> None:
        self.status = status
        self.message = message
        self.details: list[dict[str, Any]] = [dict(d) for d in details or ()]
        super().__init__(f"HTTP {status}: {message}")

    @property
    def retryable(self) -> bool:
        """Return True when sending the same request again may succeed (503 only)."""
        return self.status == 503

    def __repr__(self) -> str:
        return f"ApiError(status={self.status!r}, message={self.message!r})"


class TransportError(KeystrataClientError):
    """No HTTP answer arrived: connection refused or reset, TLS failure, or timeout.

    The original ``httpx`` exception is chained as ``__cause__``.
    """
