"""What an emulated encryptor pair counts (:class:`PairStats`), and the one set of names
(:data:`COLUMNS`) under which ``keystrata-encryptors`` and the demo show the counts."""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime

__all__ = ["COLUMNS", "PairStats"]


@dataclass
class PairStats:
    """Counters of one pair (a snapshot when read from :attr:`EncryptorEmulator.stats`).

    Attributes:
        name: the pair's name.
        rekeys_attempted: ``enc_keys`` calls the master made.
        rekeys_completed: rekeys in which the slave got every key and all matched.
        keys_obtained: keys the master received from station A.
        keys_delivered: keys the slave also received from station B.
        bits_delivered: bits of ``keys_delivered``.
        matches: delivered keys whose SHA-256 equals the master's.
        mismatches: delivered keys whose SHA-256 differs (the ends hold different keys).
        times_waited_for_key: 503 answers to ``enc_keys`` (no key ready yet), a running
            total; not errors.
        slave_retries: ``dec_keys`` attempts retried after a 503 or an unsent request.
        keys_lost: keys the master obtained that the slave could not fetch.
        errors: other failures by ``"<call>:<status or kind>"``.
        last_error: the message of the latest failure (never key material).
        last_rekey_at: when the latest rekey completed at the slave (UTC).
    """

    name: str
    rekeys_attempted: int = 0
    rekeys_completed: int = 0
    keys_obtained: int = 0
    keys_delivered: int = 0
    bits_delivered: int = 0
    matches: int = 0
    mismatches: int = 0
    times_waited_for_key: int = 0
    slave_retries: int = 0
    keys_lost: int = 0
    errors: dict[str, int] = field(default_factory=dict)
    last_error: str | None = None
    last_rekey_at: datetime | None = None

    @property
    def error_count(self) -> int:
        """Return the number of failures in :attr:`errors` (waits for key not included)."""
        return sum(self.errors.values())


#: The counts of a pair in words: stats field -> column header. The table of
#: ``keystrata-encryptors`` and the demo's screen use these headers.
COLUMNS = {
    "name": "encryptors",
    "rekeys_attempted": "rekeys",
    "keys_delivered": "keys delivered",
    "bits_delivered": "bits",
    "matches": "match",
    "mismatches": "mismatch",
    "times_waited_for_key": "times waited for key",
    "keys_lost": "keys lost",
    "errors": "failures",
}
