"""The client's error tree.

Every error the SDK raises on purpose derives from :class:`KeystrataClientError`.
Messages never carry key material: an :class:`ApiError` repeats the server's own safe
message, and a :class:`TransportError` names the failure, not the request body.

    KeystrataClientError        base; also raised for an answer the SDK cannot read
    ├── ApiError                the server answered with a non-2xx status
    └── TransportError          no answer: connection refused, TLS failure, timeout
        └── ConnectionProblem   a cause the SDK recognises, as one sentence and a hint:
                                certificate files it cannot use, a URL that is not a
                                node's base URL, a server certificate the CA does not
                                verify, a closed or refused connection
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


class ConnectionProblem(TransportError):
    """The client cannot talk to the node as it is set up, for a reason the SDK named.

    Raised when a client is built (certificate, key or CA files it cannot use, a URL
    with a path) or by a call that got no answer for a recognised reason (no server at
    the address, the server's certificate not verified by the CA, the node closing the
    connection, plain HTTP to a node that speaks HTTPS only). ``str()`` is the problem
    and the hint, one sentence each.

    Attributes:
        problem: what is wrong, one sentence naming the file or address.
        hint: what to do about it, one sentence.
    """

    def __init__(self, problem: str, hint: str) -> None:
        self.problem = problem
        self.hint = hint
        super().__init__(f"{problem}; {hint}" if hint else problem)
