"""What a running node holds after start-up, built once and passed down."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from keystrata.clock import Clock, SystemClock
from keystrata.config import Role, Settings
from keystrata.crypto.hazmat import Keyring
from keystrata.storage.db import Database


@dataclass(frozen=True)
class NodeContext:
    settings: Settings
    db: Database
    keyring: Keyring = field(repr=False)
    fingerprint_key: bytes = field(repr=False)
    clock: Clock = field(default_factory=SystemClock)
    #: What one process keeps between requests, keyed by its use case's name and created
    #: on first use: group commits (delivery/group_commit.py), counted refusals, the
    #: restore check's partners not yet compared and its next round.
    process_state: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    @property
    def node_id(self) -> str:
        return self.settings.node.id

    @property
    def role(self) -> Role:
        return self.settings.node.role
