"""Node configuration: TOML plus environment overrides, validated with clear messages."""

from __future__ import annotations

from pathlib import Path

import pytest

from keystrata.config import Role, load_settings
from keystrata.errors import ConfigError

GOOD = """
[node]
id = "station-a"
role = "station"
[tls]
ca = "pki/ca.crt"
cert = "pki/station-a.crt"
key = "pki/station-a.key"
[database]
url = "sqlite:///data/a.db"
[kek]
file = "secrets/a.kek"
[[peers]]
id = "relay-1"
url = "https://127.0.0.1:8440"
"""


def write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "node.toml"
    path.write_text(text)
    return path


def test_relative_paths_resolve_against_the_file(tmp_path: Path) -> None:
    s = load_settings(write(tmp_path, GOOD), env={})
    assert s.node.role is Role.STATION
    assert s.tls.ca == tmp_path / "pki/ca.crt"
    assert s.kek.file == tmp_path / "secrets/a.kek"
    assert s.database.url == f"sqlite:///{tmp_path}/data/a.db"
    assert s.peers[0].id == "relay-1"
    assert s.server.port == 8443  # default


def test_environment_overrides_the_file(tmp_path: Path) -> None:
    s = load_settings(
        write(tmp_path, GOOD),
        env={
            "KEYSTRATA_SERVER__PORT": "9443",
            "KEYSTRATA_DATABASE__URL": "postgresql://ks@127.0.0.1/ks",
            "UNRELATED": "x",
        },
    )
    assert s.server.port == 9443
    assert s.database.url == "postgresql://ks@127.0.0.1/ks"


@pytest.mark.parametrize(
    ("change", "names"),
    [
        (('role = "station"', 'role = "satellite"'), ["node.role", "relay"]),
        (('id = "station-a"', 'id = "bad id!"'), ["node.id", "letters, digits"]),
        (('url = "sqlite:///data/a.db"', 'url = "mysql://x"'), ["database.url"]),
        (('[kek]\nfile = "secrets/a.kek"', ""), ["kek", "is required"]),
        (("[node]", '[node]\ncolour = "blue"'), ["node.colour", "not a known setting"]),
        (('url = "https://127.0.0.1:8440"', 'url = "http://127.0.0.1:8440"'), ["peers.0.url"]),
    ],
)
def test_bad_values_name_the_setting_and_the_fix(
    tmp_path: Path, change: tuple[str, str], names: list[str]
) -> None:
    with pytest.raises(ConfigError) as caught:
        load_settings(write(tmp_path, GOOD.replace(*change)), env={})
    for name in names:
        assert name in caught.value.message


def test_bad_environment_value_names_the_variable(tmp_path: Path) -> None:
    with pytest.raises(ConfigError) as caught:
        load_settings(write(tmp_path, GOOD), env={"KEYSTRATA_SERVER__PORT": "70000"})
    assert "server.port" in caught.value.message
    assert "KEYSTRATA_SERVER__PORT" in caught.value.message


def test_missing_file_says_how_to_fix(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="--config"):
        load_settings(tmp_path / "nope.toml", env={})


def test_broken_toml_is_a_config_error(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="cannot be read"):
        load_settings(write(tmp_path, "[node\nid="), env={})
