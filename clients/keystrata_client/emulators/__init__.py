"""Emulators of the equipment around keystrata nodes, for demos and tests.

``links``: the QKD modules of relay-station QKD links (``keystrata-links``). A link runs
in fixed-rate mode (``model``: a base rate shaped by a daylight curve and clouds) or in
physical mode (``physical``: rate, QBER and clouds from the link's optical profile
through ``keystrata_physics``, as the operator's plan computes them).

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
    RateModel,
    TimeScale,
    Weather,
)
from keystrata_client.emulators.physical import PhysicalLinkModel, PhysicalProfile

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
    "PhysicalLinkModel",
    "PhysicalProfile",
    "RateModel",
    "TimeScale",
    "Weather",
    "load_config",
    "parse_config",
]
