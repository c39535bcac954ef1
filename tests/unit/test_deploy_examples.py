"""The example configurations in deploy/ stay valid as the settings evolve."""

from __future__ import annotations

from pathlib import Path

import pytest

from keystrata.config import Role, load_settings
from keystrata_client.emulators import load_config

EXAMPLES = Path(__file__).resolve().parents[2] / "deploy" / "examples"


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


def test_encryptor_emulator_example_validates() -> None:
    from keystrata_client.emulators.encryptor_config import load_encryptor_config

    config = load_encryptor_config(EXAMPLES / "encryptors.toml")
    assert [(p.master_sae_id, p.slave_sae_id) for p in config.pairs] == [
        ("enc-karsvik-1", "enc-tollmere-1"),
        ("enc-brenhaven-1", "enc-karsvik-2"),
    ]
    first, second = config.pairs
    assert (first.key_size_bits, first.keys_per_rekey) == (256, 2)  # from [defaults]
    assert (second.key_size_bits, second.interval_seconds) == (512, 10.0)  # per pair
    assert first.master_identity is not None
    assert first.master_identity.ca == EXAMPLES / "pki" / "ca.crt"
    assert config.options["summary_seconds"] == 5.0
