"""Answers a node reads from a peer's routes (not sent through the outbox): a station's
buffer report for its relay, and a page of a station's consumption points for the
restore check of the pair's other station. Strict, versioned models like the messages
(:mod:`keystrata.peering.messages`): the answering node writes :meth:`Answer.to_json`,
the asking node reads it back with :meth:`Answer.from_json` once.
"""

from __future__ import annotations

from typing import Annotated, Any, ClassVar, Literal, Self

from pydantic import Field, ValidationError, model_validator

from keystrata.peering.messages import Count, NodeId, StrictModel, Time, Uuid, invalid_input


class Answer(StrictModel):
    """An answer a node reads from a peer's route (not sent through the outbox)."""

    what: ClassVar[str] = "answer"

    def to_json(self) -> dict[str, Any]:
        return self.model_dump(mode="json")

    @classmethod
    def from_json(cls, raw: Any) -> Self:
        """Parse an answer. Raises InvalidInput naming the first bad member."""
        try:
            return cls.model_validate(raw)
        except ValidationError as exc:
            raise invalid_input(cls.what, exc) from None


class BufferReport(Answer):
    """A station's key buffer for one pair (bits), as its relay polls it."""

    v: Literal[1] = 1
    pair_id: NodeId
    station: NodeId
    ready_bits: Count
    owned_ready_bits: Count
    pending_bits: Count
    delivered_bits: Count
    #: Bits its masters asked for in the window and did not get: not enough ready key.
    unmet_bits: Count = 0
    window_seconds: Annotated[int, Field(strict=True, ge=1, le=86_400)]
    reported_at: Time

    what: ClassVar[str] = "buffer report"


class ProgressPoint(StrictModel):
    """One segment's consumption point at the answering station (no key material)."""

    segment_id: Uuid
    owner: NodeId
    used: Count
    unacked: Count

    @model_validator(mode="after")
    def _consistent(self) -> ProgressPoint:
        if self.unacked > self.used:
            raise ValueError("unacked cannot exceed used")
        return self


class ProgressReport(Answer):
    """A station's consumption points of one pair, one page, for the restore check of
    the pair's other station (``GET /api/v1/peer/pairs/{pair}/progress``).

    The first page also carries ``fetched_keys``: keys of the caller's ownership this
    station has served to at least one slave (a count that only grows), and
    ``seen_fetched``: the highest ``fetched_keys`` the caller has shown this station.
    """

    v: Literal[1] = 1
    pair_id: NodeId
    station: NodeId
    points: Annotated[list[ProgressPoint], Field(max_length=1000)]
    next_after: Uuid | None = None
    fetched_keys: Count | None = None
    seen_fetched: Count | None = None

    what: ClassVar[str] = "progress report"
