"""The ``[dashboard]`` settings: defaults, the environment override the browser test uses,
and bad values refused naming the setting."""

from __future__ import annotations

from pathlib import Path

import pytest

from keystrata.config import load_settings
from keystrata.errors import ConfigError

NODE = """
[node]
id = "station-a"
role = "station"
[tls]
ca = "ca.crt"
cert = "a.crt"
key = "a.key"
[database]
url = "sqlite:///a.db"
[kek]
file = "a.kek"
"""


def _path(tmp_path: Path, extra: str = "") -> Path:
    path = tmp_path / "node.toml"
    path.write_text(NODE + extra)
    return path


def test_defaults_file_and_environment(tmp_path: Path) -> None:
    cfg = load_settings(_path(tmp_path), env={}).dashboard
    assert (cfg.sample_seconds, cfg.retention_days) == (30.0, 7.0)
    cfg = load_settings(_path(tmp_path, "[dashboard]\nretention_days = 2\n"), env={}).dashboard
    assert cfg.retention_days == 2.0
    env = {"KEYSTRATA_DASHBOARD__SAMPLE_SECONDS": "1"}
    assert load_settings(_path(tmp_path), env=env).dashboard.sample_seconds == 1.0


@pytest.mark.parametrize(
    ("line", "setting"),
    [
        ("sample_seconds = 0.5", "dashboard.sample_seconds"),
        ("sample_seconds = 7200", "dashboard.sample_seconds"),
        ("retention_days = 0", "dashboard.retention_days"),
        ("retention_days = 400", "dashboard.retention_days"),
        ("keep_forever = true", "dashboard.keep_forever"),
    ],
)
def test_bad_values_name_the_setting(tmp_path: Path, line: str, setting: str) -> None:
    with pytest.raises(ConfigError, match=f"setting {setting}:"):
        load_settings(_path(tmp_path, f"[dashboard]\n{line}\n"), env={})
