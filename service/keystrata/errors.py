"""The one error tree of the service.

Every error the service raises on purpose derives from :class:`KeystrataError`.
Each class carries the HTTP status it maps to and a message that is safe to show
to the caller: it never holds key material, and authentication failures all look
the same. Foreign exceptions are wrapped with ``raise ... from exc``.

    KeystrataError (500)
    ├── ConfigError             a setting is missing or wrong; the node does not start
    ├── StartupRefused          a check at start failed (KEK file mode, wrong KEK, ...)
    ├── CryptoError
    │   └── SealBroken          a sealed value failed to open (wrong key, row moved, tampered)
    ├── BadRequest (400)
    │   └── InvalidInput        a field failed validation; ``details`` says which
    ├── Unauthenticated (401)   no certificate, or one that maps to no principal
    ├── Forbidden (403)         an authenticated principal whose role the route does not admit
    ├── NotFound (404)
    ├── Conflict (409)
    │   ├── AlreadyExists
    │   └── BlockConflict       a link key block ID re-sent with different bytes
    ├── PayloadTooLarge (413)
    ├── UnsupportedMediaType (415)
    └── Unavailable (503)       the database or a peer cannot be reached right now
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any


class KeystrataError(Exception):
    """Base of every deliberate error; ``message`` is safe to return to callers."""

    status: int = 500
    default_message = "internal error"

    def __init__(
        self,
        message: str | None = None,
        *,
        details: Sequence[Mapping[str, Any]] | None = None,
    ) -> None:
        self.message = message or self.default_message
        self.details: list[dict[str, Any]] = [dict(d) for d in details or ()]
        super().__init__(self.message)


class ConfigError(KeystrataError):
    """A setting is missing or invalid. The message names the setting and the fix."""

    default_message = "invalid configuration"


class StartupRefused(KeystrataError):
    """A start-up check failed; the node must not serve."""

    default_message = "node refused to start"


class CryptoError(KeystrataError):
    default_message = "cryptographic operation failed"


class SealBroken(CryptoError):
    """A sealed value did not open: wrong key, tampered bytes, or bound to another row."""

    default_message = "sealed value failed to open"


class BadRequest(KeystrataError):
    status = 400
    default_message = "bad request"


class InvalidInput(BadRequest):
    default_message = "invalid input"


class Unauthenticated(KeystrataError):
    status = 401
    # One message for every reason, so the answer is no oracle.
    default_message = "unauthorized"


class Forbidden(KeystrataError):
    status = 403
    default_message = "this route is not open to your role"


class NotFound(KeystrataError):
    status = 404
    default_message = "not found"


class Conflict(KeystrataError):
    status = 409
    default_message = "conflict"


class AlreadyExists(Conflict):
    default_message = "already exists"


class BlockConflict(Conflict):
    default_message = "a block with this ID was already received with different key bytes"


class PayloadTooLarge(KeystrataError):
    status = 413
    default_message = "request body too large"


class UnsupportedMediaType(KeystrataError):
    status = 415
    default_message = "unsupported content type"


class Unavailable(KeystrataError):
    status = 503
    default_message = "service temporarily unavailable"
