"""Emulators of the equipment around keystrata nodes, for demos and tests.

``links``: the QKD modules of relay-station QKD links (``keystrata-links``), driven by
the daylight-and-clouds rate model in ``model``.

``encryptors``: pairs of encryptors rekeying over ETSI GS QKD 014
(``keystrata-encryptors``; TOML file in ``encryptor_config``, command in
``encryptor_cli``).
"""

from keystrata_client.emulators.config import (
    ConfigError,
    EmulatorConfig,
    LinkSpec,
    load_config,
    parse_config,
)
from keystrata_client.emulators.engine import EndStats, LinkEmulator, LinkStats
from keystrata_client.emulators.model import (
    LinkModel,
    LinkState,
    ModelParams,
    TimeScale,
    Weather,
)

__all__ = [
    "ConfigError",
    "EmulatorConfig",
    "EndStats",
    "LinkEmulator",
    "LinkModel",
    "LinkSpec",
    "LinkState",
    "LinkStats",
    "ModelParams",
    "TimeScale",
    "Weather",
    "load_config",
    "parse_config",
]
