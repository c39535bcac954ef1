"""The TOML file of ``keystrata-encryptors``: which encryptor pairs to emulate.

Format (keys marked required have no default)::

    [emulator]                      # optional; how the emulator runs
    summary_seconds = 5.0           # real seconds between two tables
    drain_seconds = 5.0             # at the end, how long slaves keep fetching
    slave_patience_seconds = 5.0    # how long a slave retries one dec_keys after 503s
    slave_retry_seconds = 0.2       # wait between two such retries
    timeout_seconds = 10.0          # HTTP timeout of each SAE's client

    [defaults]                      # optional; any [[pair]] key except the SAE IDs
    ca = "pki/ca.crt"
    key_size_bits = 256

    [[pair]]                        # one per pair of encryptors
    name = "karsvik-tollmere"       # default: "<master_sae_id> -> <slave_sae_id>"
    master_sae_id = "enc-karsvik-1"             # required: the SAE calling Get key
    master_url = "https://127.0.0.1:8441"       # required: its station's node
    master_cert = "pki/enc-karsvik-1.crt"       # its certificate and key
    master_key = "pki/enc-karsvik-1.key"
    slave_sae_id = "enc-tollmere-1"             # required: the SAE calling Get key with IDs
    slave_url = "https://127.0.0.1:8442"        # required: its station's node
    slave_cert = "pki/enc-tollmere-1.crt"
    slave_key = "pki/enc-tollmere-1.key"
    ca = "pki/ca.crt"               # the network CA, for both ends
    key_size_bits = 256             # a multiple of 8
    keys_per_rekey = 1
    interval_seconds = 1.0          # time between the starts of two rekeys

An ``https://`` URL needs ``ca`` and that end's certificate and key. Relative paths are
resolved against the folder of the TOML file. Unknown keys are an error, so a typo does
not pass silently.
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from keystrata_client._tls import TlsIdentity
from keystrata_client.emulators.config import ConfigError
from keystrata_client.emulators.encryptors import EncryptorPairSpec

__all__ = ["EncryptorConfig", "load_encryptor_config", "parse_encryptor_config"]

_REQUIRED = {"master_sae_id", "master_url", "slave_sae_id", "slave_url"}
_PER_PAIR = {"name", "master_sae_id", "slave_sae_id"}
_PAIR_KEYS: dict[str, type] = {
    "name": str,
    "master_sae_id": str,
    "master_url": str,
    "master_cert": str,
    "master_key": str,
    "slave_sae_id": str,
    "slave_url": str,
    "slave_cert": str,
    "slave_key": str,
    "ca": str,
    "key_size_bits": int,
    "keys_per_rekey": int,
    "interval_seconds": float,
}
_EMULATOR_KEYS: dict[str, type] = {
    "summary_seconds": float,
    "drain_seconds": float,
    "slave_patience_seconds": float,
    "slave_retry_seconds": float,
    "timeout_seconds": float,
}


@dataclass(frozen=True, slots=True)
class EncryptorConfig:
    """A parsed configuration file: the pairs, and the emulator's options."""

    pairs: list[EncryptorPairSpec]
    options: dict[str, float] = field(default_factory=dict)


def _typed(where: str, value: Any, kind: type) -> Any:
    if kind is float and isinstance(value, int) and not isinstance(value, bool):
        return float(value)
    if isinstance(value, bool) or not isinstance(value, kind):
        raise ConfigError(f"{where}: expected {kind.__name__}, got {type(value).__name__}")
    return value


def _identity(where: str, values: dict[str, Any], end: str, base: Path) -> TlsIdentity | None:
    url = values[f"{end}_url"]
    if not url.startswith(("https://", "http://")):
        raise ConfigError(f"{where}.{end}_url: must start with https://")
    ca, cert, key = values.get("ca"), values.get(f"{end}_cert"), values.get(f"{end}_key")
    if cert is None and key is None and url.startswith("http://"):
        return None
    if ca is None or cert is None or key is None:
        raise ConfigError(f"{where}: the {end} end needs ca, {end}_cert and {end}_key")
    return TlsIdentity(ca=base / ca, cert=base / cert, key=base / key)


def _pair(where: str, values: dict[str, Any], base: Path) -> EncryptorPairSpec:
    unknown = sorted(set(values) - set(_PAIR_KEYS))
    if unknown:
        raise ConfigError(f"{where}: unknown key(s) {', '.join(unknown)}")
    missing = sorted(_REQUIRED - set(values))
    if missing:
        raise ConfigError(f"{where}: missing key(s) {', '.join(missing)}")
    typed = {k: _typed(f"{where}.{k}", v, _PAIR_KEYS[k]) for k, v in values.items()}
    name = typed.get("name", f"{typed['master_sae_id']} -> {typed['slave_sae_id']}")
    try:
        return EncryptorPairSpec(
            name=name,
            master_sae_id=typed["master_sae_id"],
            slave_sae_id=typed["slave_sae_id"],
            master_url=typed["master_url"],
            slave_url=typed["slave_url"],
            master_identity=_identity(where, typed, "master", base),
            slave_identity=_identity(where, typed, "slave", base),
            key_size_bits=typed.get("key_size_bits", 256),
            keys_per_rekey=typed.get("keys_per_rekey", 1),
            interval_seconds=typed.get("interval_seconds", 1.0),
        )
    except ValueError as exc:
        if isinstance(exc, ConfigError):
            raise
        raise ConfigError(f"{where}: {exc}") from exc


def parse_encryptor_config(data: dict[str, Any], base: Path) -> EncryptorConfig:
    """Return the configuration described by parsed TOML ``data``.

    Raises:
        ConfigError: a key is unknown, missing, of the wrong type or out of range.
    """
    unknown = sorted(set(data) - {"emulator", "defaults", "pair"})
    if unknown:
        raise ConfigError(f"unknown table(s) {', '.join(unknown)}")
    options: dict[str, float] = {}
    for name, value in dict(data.get("emulator", {})).items():
        if name not in _EMULATOR_KEYS:
            raise ConfigError(f"emulator: unknown key {name}")
        options[name] = _typed(f"emulator.{name}", value, _EMULATOR_KEYS[name])
    for name in ("summary_seconds", "slave_retry_seconds", "timeout_seconds"):
        if name in options and not options[name] > 0:
            raise ConfigError(f"emulator.{name}: must be positive")
    for name in ("drain_seconds", "slave_patience_seconds"):
        if options.get(name, 0.0) < 0:
            raise ConfigError(f"emulator.{name}: must not be negative")
    defaults = dict(data.get("defaults", {}))
    bad_defaults = sorted(set(defaults) & _PER_PAIR)
    if bad_defaults:
        raise ConfigError(f"defaults: {', '.join(bad_defaults)} must be set per pair")
    tables = data.get("pair", [])
    if not isinstance(tables, list) or not tables:
        raise ConfigError("no [[pair]] table: give at least one pair of encryptors")
    if not all(isinstance(t, dict) for t in tables):
        raise ConfigError("pair: write each pair as a [[pair]] table")
    pairs = [_pair(f"pair[{i}]", defaults | dict(t), base) for i, t in enumerate(tables)]
    seen: set[str] = set()
    for spec in pairs:
        if spec.name in seen:
            raise ConfigError(f"pair name {spec.name!r} appears twice")
        seen.add(spec.name)
    return EncryptorConfig(pairs=pairs, options=options)


def load_encryptor_config(path: Path) -> EncryptorConfig:
    """Return the configuration in the TOML file at ``path``.

    Raises:
        ConfigError: the file cannot be read, is not TOML, or is wrong (see
            :func:`parse_encryptor_config`).
    """
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read ({exc.strerror})") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc})") from exc
    return parse_encryptor_config(data, path.resolve().parent)
