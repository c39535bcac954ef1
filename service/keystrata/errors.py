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
    │   ├── BlockConflict       a link key block ID re-sent with different bytes
    │   ├── OutOfOrder          a peer message came before one it depends on; sent again
    │   ├── LinkKeyReused       a peer message names link key already used here
    │   ├── LinkKeyShort        not enough link key for a segment
    │   └── EpsilonTooLarge     a segment would exceed its pair's security parameter
    ├── PayloadTooLarge (413)
    ├── UnsupportedMediaType (415)
    └── Unavailable (503)       the database or a peer cannot be reached right now
        ├── PeerUnavailable     a peer did not answer (connection, TLS, identity, timeout)
        ├── NotEnoughKey        not enough ready key for a Get key request
        ├── QuotaReached        the pair's (or the SAE's) daily quota is used up
        ├── AllocationNotHere   a key ID's allocation has not reached this station yet
        ├── StoredKeyBroken     stored pair key failed its integrity check
        ├── PairHeld            the restore check holds the pair
        └── NotYetCompared      the restore check has not compared the pair since start
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


class OutOfOrder(Conflict):
    """What a peer message names has not arrived or been reached here yet: an earlier
    message is still on its way. The sender's outbox backs off and sends it again."""

    default_message = "not yet: what this message names is not available here yet"


class LinkKeyReused(Conflict):
    """A range names link bytes this node has already used."""

    default_message = "refused: the message names link key that was already used"


class LinkKeyShort(Conflict):
    default_message = "not enough link key for this segment"


class EpsilonTooLarge(Conflict):
    default_message = "the segment's security parameter would exceed the pair's maximum"


class PayloadTooLarge(KeystrataError):
    status = 413
    default_message = "request body too large"


class UnsupportedMediaType(KeystrataError):
    status = 415
    default_message = "unsupported content type"


class Unavailable(KeystrataError):
    status = 503
    default_message = "service temporarily unavailable"


class TransactionConflict(Unavailable):
    """The database ended the transaction to break a deadlock or a serialisation
    conflict (PostgreSQL SQLSTATE 40P01, 40001): nothing of it was committed, and the
    same work may simply run again."""

    default_message = "the database is not available; try again later"


class PeerUnavailable(Unavailable):
    """The peer did not answer (connection, TLS, a wrong identity, or timeout)."""

    default_message = "a peer node cannot be reached right now"


class NotEnoughKey(Unavailable):
    default_message = "not enough key is ready for this request; try again later"


class QuotaReached(Unavailable):
    default_message = "the pair's daily key quota is used up"


class AllocationNotHere(Unavailable):
    default_message = "a requested key has not reached this station yet; try again"


class StoredKeyBroken(Unavailable):
    """A segment's sealed key does not open in its row: its owner, pair or offset was
    changed outside keystrata. Nothing is handed out; an operator must look."""

    default_message = (
        "stored pair key failed its integrity check; nothing was handed out "
        "(an operator must look at this station's database)"
    )


class PairHeld(Unavailable):
    default_message = (
        "this station's state for the pair is behind its partner's; an operator must resolve it"
    )


class NotYetCompared(Unavailable):
    default_message = (
        "this station has not yet compared its state for the pair with its partner "
        "since it started; try again"
    )
