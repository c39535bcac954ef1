"""The states of an allocated key (``key_alloc.state``) and the moves between them.

At the slave's station a key starts *waiting*, sealed, for its slaves; it becomes
*delivered* once every slave has fetched it, or *expired* when its time-to-live ends
first (its bytes are destroyed either way). At the owner (the master's station) a key
is *delivered* at once, handed to its master in the Get key answer; it becomes
*expired* when the slave's station reports that no slave fetched it in time.
Delivered and expired keys hold no key bytes (``sealed`` is NULL).
"""

from __future__ import annotations

from collections.abc import Iterable
from enum import StrEnum


class KeyState(StrEnum):
    WAITING = "waiting"
    DELIVERED = "delivered"
    EXPIRED = "expired"


#: Where each state may go.
TRANSITIONS: dict[KeyState, frozenset[KeyState]] = {
    KeyState.WAITING: frozenset({KeyState.DELIVERED, KeyState.EXPIRED}),
    KeyState.DELIVERED: frozenset({KeyState.EXPIRED}),  # at the owner, reported uncollected
    KeyState.EXPIRED: frozenset(),
}


def move(current: str, to: KeyState) -> str:
    """The stored state after moving a key from ``current`` to ``to``.

    Raises:
        ValueError: the move is not one of :data:`TRANSITIONS`.
    """
    if to not in TRANSITIONS[KeyState(current)]:
        raise ValueError(f"a {current} key cannot become {to}")
    return to.value


def at_slave_station(*, live: bool) -> str:
    """The first (stored) state of a key at the slave's station: waiting while its
    lifetime lasts, expired when it ended before the allocation arrived."""
    return (KeyState.WAITING if live else KeyState.EXPIRED).value


#: The first (stored) state of a key at the owner: handed to its master at once.
AT_OWNER = KeyState.DELIVERED.value


def after_fetch(slaves: Iterable[str], fetched: Iterable[str]) -> KeyState:
    """The state of a waiting key once ``fetched`` have fetched it."""
    return KeyState.DELIVERED if set(fetched) >= set(slaves) else KeyState.WAITING
