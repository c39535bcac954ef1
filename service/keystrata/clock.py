"""Time and randomness, passed in so that tests can be exact."""

from __future__ import annotations

import os
from datetime import UTC, datetime
from typing import Protocol


class Clock(Protocol):
    def now(self) -> datetime:
        """Return the current time, timezone-aware in UTC."""
        ...


class SystemClock:
    def now(self) -> datetime:
        return datetime.now(UTC)


class RandomSource(Protocol):
    def bytes(self, n: int) -> bytes:
        """Return ``n`` bytes from a cryptographically secure source."""
        ...


class SystemRandom:
    def bytes(self, n: int) -> bytes:
        return os.urandom(n)
