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
    #: Per-process state of services that batch requests (see delivery/group_commit.py),
    #: created on first use and keyed by the service's name.
    lanes: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    @property
    def node_id(self) -> str:
        return self.settings.node.id

    @property
    def role(self) -> Role:
        return self.settings.node.role
