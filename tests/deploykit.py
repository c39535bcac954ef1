"""What the deploy tests share: the deploy folder, compose.yaml as read by PyYAML, the
compose secrets script as a module, and small readers of the files."""

from __future__ import annotations

import importlib.util
import re
import subprocess
from pathlib import Path
from types import ModuleType
from typing import Any

import yaml  # type: ignore[import-untyped]

from keystrata.config import Role, Settings, load_settings

DEPLOY = Path(__file__).resolve().parents[1] / "deploy"
NODES = {
    "relay-vela": Role.RELAY,
    "karsvik": Role.STATION,
    "tollmere": Role.STATION,
    "brenhaven": Role.STATION,
}
COMPOSE: dict[str, Any] = yaml.safe_load((DEPLOY / "compose.yaml").read_text())
SERVICES: dict[str, Any] = COMPOSE["services"]
SECRETS_DIR = "./compose/secrets/"


def load_module(path: Path) -> ModuleType:
    spec = importlib.util.spec_from_file_location(path.stem, path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


make_secrets = load_module(DEPLOY / "compose" / "make_secrets.py")


def binds(service: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """Container path -> long-syntax volume entry."""
    return {v["target"]: v for v in service.get("volumes", [])}


def secret_paths(service: dict[str, Any]) -> dict[str, str]:
    """Container path -> top-level secret name (compose mounts at /run/secrets/<target>)."""
    return {f"/run/secrets/{s['target']}": s["source"] for s in service.get("secrets", [])}


def node_settings(node: str) -> Settings:
    mount = binds(SERVICES[node])["/etc/keystrata/node.toml"]
    assert mount["type"] == "bind" and mount["read_only"] is True
    assert mount["source"] == f"./compose/{node}.toml"
    return load_settings(DEPLOY / mount["source"], env={})  # load_settings checks no file


def init_roles() -> list[str]:
    text = (DEPLOY / "compose" / "postgres-init.sh").read_text()
    found = re.search(r'^KEYSTRATA_NODE_ROLES="([^"]+)"$', text, re.M)
    assert found
    return found.group(1).split()


def run_line(command: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    """Run a command line (split on spaces: the paths here have none)."""
    return subprocess.run(
        command.split(), env=env, capture_output=True, text=True, timeout=300, check=False
    )
