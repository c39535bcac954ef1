"""Answers a node reads from a peer's routes (not sent through the outbox): a station's
buffer report for its relay, a page of a station's consumption points for the restore
check of the pair's other station, and the registry facts a node shares with the caller
(registry/comparison.py). Strict, versioned models like the messages
(:mod:`keystrata.peering.messages`): the answering node writes :meth:`Answer.to_json`,
the asking node reads it back with :meth:`Answer.from_json` once.
"""

from __future__ import annotations

from typing import Annotated, Any, ClassVar, Literal, Self

from pydantic import Field, StringConstraints, ValidationError, model_validator

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


#: Entries of one kind a shared-registry answer may carry.
MAX_SHARED = 10_000
PolicyName = Annotated[str, StringConstraints(strict=True, pattern=r"^[a-z][a-z0-9_]{0,63}$")]
#: A policy value as the registry stores it: a number, null, or a list of SAE IDs.
PolicyValue = (
    Annotated[int, Field(strict=True, ge=-(2**62), le=2**62)]
    | Annotated[float, Field(strict=True, allow_inf_nan=False)]
    | Annotated[list[NodeId], Field(max_length=1024)]
    | None
)


class NodeFact(StrictModel):
    role: Literal["relay", "station"]
    retired: bool


class LinkFact(StrictModel):
    relay_id: NodeId
    station_id: NodeId
    retired: bool


class PairFact(StrictModel):
    relay_id: NodeId
    stations: Annotated[list[NodeId], Field(min_length=2, max_length=2)]
    retired: bool
    policy: Annotated[dict[PolicyName, PolicyValue], Field(max_length=64)]


class SaeFact(StrictModel):
    station_id: NodeId
    retired: bool


class SharedRegistry(Answer):
    """The registry facts the answering node (``node``) shares with the calling node
    (``peer``), from the answering node's rows (``GET /api/v1/peer/registry/shared``);
    the members and what they hold are described in :mod:`keystrata.registry.comparison`.
    """

    v: Literal[1] = 1
    node: NodeId
    peer: NodeId
    nodes: Annotated[dict[NodeId, NodeFact], Field(max_length=MAX_SHARED)]
    links: Annotated[dict[NodeId, LinkFact], Field(max_length=MAX_SHARED)]
    pairs: Annotated[dict[NodeId, PairFact], Field(max_length=MAX_SHARED)]
    saes: Annotated[dict[NodeId, SaeFact], Field(max_length=MAX_SHARED)]

    what: ClassVar[str] = "shared registry"
