"""What key delivery needs from outside its station, as Protocols the composition root
(:mod:`keystrata.server`) wires to real parts (:class:`keystrata.peering.client.
PeerClient` satisfies them) and tests wire to stand-ins."""

from __future__ import annotations

from typing import Any, Protocol


class AllocationSource(Protocol):
    """Where Get key with key IDs asks an owning station for the ``key.allocated``
    messages it still holds for this station."""

    def pending_allocations(self, owner: str, /) -> list[dict[str, Any]] | None:
        """The owner's pending allocation message bodies ([] when none), or None when
        the owner cannot be asked now."""
        ...
