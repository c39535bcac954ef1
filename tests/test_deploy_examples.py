"""The example configurations in deploy/ stay valid as the settings evolve."""

from __future__ import annotations

from pathlib import Path

import pytest

from keystrata.config import Role, load_settings
from keystrata_client.emulators import load_config

EXAMPLES = Path(__file__).resolve().parent.parent / "deploy" / "examples"


@pytest.mark.parametrize(
    ("name", "role"), [("relay.toml", Role.RELAY), ("station.toml", Role.STATION)]
)
def test_node_examples_validate(name: str, role: Role) -> None:
    settings = load_settings(EXAMPLES / name, env={})
    assert settings.node.role is role
    assert settings.peers


def test_emulator_example_validates() -> None:
    config = load_config(EXAMPLES / "links.toml")
    assert [spec.link_id for spec in config.links] == ["link-karsvik"]
