"""The TOML file of ``keystrata-links``: which links to emulate and how.

Each link runs in one of two modes (``model.py`` and ``physical.py`` describe them):

- **fixed-rate**: ``base_rate_bps`` shaped by a daylight curve and clouds of mean
  ``mean_clear_s`` / ``mean_cloud_s``, QBER drawn around ``qber_mean``. Tests and simple
  runs use it.
- **physical**: the link carries three tables, ``optics``
  (``keystrata_physics.optics.LinkOptics`` fields), ``platform`` (``Platform``) and
  ``station`` (``StationSky``), and rate, QBER and clouds come from the link model. A
  physical link takes none of the fixed-rate keys ``base_rate_bps``, ``day_factor``,
  ``twilight``, ``longitude_deg``, ``mean_clear_s``, ``mean_cloud_s``, ``qber_mean``
  (the model and the station's sky decide them); ``qber_sd`` is allowed (default 0).

Format (all keys but the three in ``[[link]]`` marked required have defaults)::

    [emulator]                      # optional; how the emulator runs
    time_scale = 60.0               # emulated seconds per real second
    start = 2026-06-21T00:00:00Z    # emulated start (TOML date-time with offset); default now
    tick_seconds = 0.25             # real seconds between two rate integrations
    push_interval_seconds = 1.0     # real seconds to gather blocks into a batch
    batch_max_blocks = 64           # blocks per push at most
    backlog_max_blocks = 4096       # unsent blocks per end at most (see links.py)
    drain_seconds = 5.0             # at stop, how long to keep pushing the backlog
    summary_seconds = 5.0           # real seconds between two summary lines
    form = "binary"                 # or "json"

    [defaults]                      # optional; any [[link]] key except the required ones
    ca = "pki/ca.pem"

    [[link]]                        # one per relay-station QKD link, fixed-rate mode
    link_id = "link-orla-east"      # required
    relay_url = "https://127.0.0.1:8441"    # required
    station_url = "https://127.0.0.1:8442"  # required
    cert = "pki/module-orla-east.pem"       # identity at both ends, with key and ca
    key = "pki/module-orla-east.key"
    # relay_cert, relay_key, station_cert, station_key: a different identity per end
    seed = 7                        # default: CRC-32 of link_id, so runs repeat
    block_bytes = 4096
    epsilon = 1e-10
    base_rate_bps = 20000.0         # required in fixed-rate mode (here or in [defaults])
    day_factor = 0.1
    twilight = 0.15
    longitude_deg = 0.0
    mean_clear_s = 21600.0
    mean_cloud_s = 3600.0
    qber_mean = 0.02
    qber_sd = 0.004

    [[link]]                        # physical mode: all three tables
    link_id = "link-orla-west"
    relay_url = "https://127.0.0.1:8441"
    station_url = "https://127.0.0.1:8443"
    [link.optics]                   # LinkOptics fields; all have defaults
    protocol = "decoy-bb84"         # or "cv-gg02"
    clock_hz = 1e8
    filter_nm = 1.0
    [link.platform]                 # Platform fields; latitude_deg, longitude_deg required
    latitude_deg = 58.0
    longitude_deg = 11.0
    on_station_hours = [[0, 24]]
    [link.station]                  # StationSky fields; latitude_deg, longitude_deg required
    latitude_deg = 58.05
    longitude_deg = 11.1
    clear_sky = 0.7                 # a number, 12 (by month) or 12 rows of 24 (month, UTC hour)
    mean_cloud_spell_s = 3600.0

``[defaults]`` may hold ``optics``, ``platform`` and ``station`` tables too (one relay
for all links, say); a link's table then sets fields over the default's, field by field.
Relative paths are resolved against the folder of the TOML file. Unknown keys are an
error, so a typo does not pass silently; so are a link with some but not all three
physical tables, and one mixing them with fixed-rate keys.
"""

from __future__ import annotations

import dataclasses
import tomllib
import zlib
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

from keystrata_client._tls import TlsIdentity
from keystrata_client.emulators.model import ModelParams
from keystrata_client.emulators.physical import PhysicalProfile
from keystrata_physics.optics import LinkOptics, Platform, StationSky, from_mapping

_MODEL_KEYS = {
    "base_rate_bps",
    "day_factor",
    "twilight",
    "longitude_deg",
    "mean_clear_s",
    "mean_cloud_s",
    "qber_mean",
    "qber_sd",
}
#: Keys of fixed-rate mode that a physical link must not carry (qber_sd fits both).
_FIXED_ONLY = _MODEL_KEYS - {"qber_sd"}
_PHYSICAL_TABLES: dict[str, type[LinkOptics | Platform | StationSky]] = {
    "optics": LinkOptics,
    "platform": Platform,
    "station": StationSky,
}
_REQUIRED = {"link_id", "relay_url", "station_url"}
_FILE_KEYS = {"ca", "cert", "key", "relay_cert", "relay_key", "station_cert", "station_key"}
_LINK_KEYS = (
    _REQUIRED
    | _FILE_KEYS
    | _MODEL_KEYS
    | set(_PHYSICAL_TABLES)
    | {"seed", "block_bytes", "epsilon"}
)
_EMULATOR_KEYS = {
    "time_scale": float,
    "start": datetime,
    "tick_seconds": float,
    "push_interval_seconds": float,
    "batch_max_blocks": int,
    "backlog_max_blocks": int,
    "drain_seconds": float,
    "summary_seconds": float,
    "form": str,
}


class ConfigError(ValueError):
    """The emulator's TOML file is unreadable or wrong; the message names the key."""


@dataclass(frozen=True, slots=True)
class LinkSpec:
    """One QKD link to emulate.

    Attributes:
        link_id: the link's ID, as registered at both nodes.
        relay_url: base URL of the relay node.
        station_url: base URL of the station node.
        relay_identity: the module's TLS identity at the relay (None: no client cert).
        station_identity: the module's TLS identity at the station.
        model: the rate model's parameters: :class:`ModelParams` runs the link in
            fixed-rate mode, :class:`PhysicalProfile` in physical mode.
        seed: seed of the weather chain and the QBER draws (never of key bytes).
        block_bytes: key bytes per block.
        epsilon: epsilon reported with every block.
    """

    link_id: str
    relay_url: str
    station_url: str
    relay_identity: TlsIdentity | None
    station_identity: TlsIdentity | None
    model: ModelParams | PhysicalProfile
    seed: int = 0
    block_bytes: int = 4096
    epsilon: float = 1e-10

    def __post_init__(self) -> None:
        if not self.link_id:
            raise ValueError("link_id must not be empty")
        if self.block_bytes < 1:
            raise ValueError("block_bytes must be at least 1")
        if not 0.0 <= self.epsilon < 1.0:
            raise ValueError("epsilon must lie in [0, 1)")


@dataclass(frozen=True, slots=True)
class EmulatorConfig:
    """A parsed configuration file: the links, and the emulator's options."""

    links: list[LinkSpec]
    options: dict[str, Any] = field(default_factory=dict)


def _typed(where: str, value: Any, kind: type) -> Any:
    if kind is float and isinstance(value, int) and not isinstance(value, bool):
        return float(value)
    if kind is datetime and isinstance(value, str):
        try:
            value = datetime.fromisoformat(value)
        except ValueError as exc:
            raise ConfigError(f"{where}: not an RFC 3339 date-time") from exc
    if isinstance(value, bool) or not isinstance(value, kind):
        raise ConfigError(f"{where}: expected {kind.__name__}, got {type(value).__name__}")
    if isinstance(value, datetime) and value.utcoffset() is None:
        raise ConfigError(f"{where}: give a time zone offset, e.g. 2026-06-21T00:00:00Z")
    return value


def _identity(where: str, values: dict[str, Any], end: str, base: Path) -> TlsIdentity | None:
    ca = values.get("ca")
    cert = values.get(f"{end}_cert", values.get("cert"))
    key = values.get(f"{end}_key", values.get("key"))
    if ca is None and cert is None and key is None:
        if str(values[f"{end}_url"]).startswith("https://"):
            raise ConfigError(f"{where}: an https {end}_url needs ca, cert and key")
        return None
    if ca is None or cert is None or key is None:
        raise ConfigError(f"{where}: the {end} end needs all of ca, cert and key")
    paths = [
        base / Path(_typed(f"{where}.{name}", v, str))
        for name, v in (("ca", ca), ("cert", cert), ("key", key))
    ]
    return TlsIdentity(ca=paths[0], cert=paths[1], key=paths[2])


def _table(where: str, name: str, value: Any) -> LinkOptics | Platform | StationSky:
    """Build one physical table; every error names ``<name>.<field>``."""
    kind = _PHYSICAL_TABLES[name]
    if not isinstance(value, dict):
        raise ConfigError(f"{where}: {name}: write it as a table of {kind.__name__} fields")
    fields = dataclasses.fields(kind)
    names = {f.name for f in fields}
    unknown = sorted(set(value) - names)
    if unknown:
        raise ConfigError(
            f"{where}: {name}.{unknown[0]}: unknown field; known: {', '.join(sorted(names))}"
        )
    for f in fields:
        if f.default is dataclasses.MISSING and f.name not in value:
            raise ConfigError(f"{where}: {name}.{f.name}: missing (required)")
    hours = value.get("on_station_hours", [])
    if name == "platform" and not (
        isinstance(hours, list) and all(isinstance(w, list) for w in hours)
    ):
        raise ConfigError(
            f"{where}: platform.on_station_hours: must be a list of [start, end] UTC hours"
        )
    try:
        return from_mapping(kind, value)
    except (ValueError, TypeError) as exc:
        head, _, rest = str(exc).partition(" ")
        if head in names:
            raise ConfigError(f"{where}: {name}.{head}: {rest}") from None
        raise ConfigError(f"{where}: {name}: {exc}") from None


def _physical(where: str, values: dict[str, Any], defaulted: set[str]) -> PhysicalProfile | None:
    """The link's optical profile, or ``None`` for a fixed-rate link."""
    given = [name for name in _PHYSICAL_TABLES if name in values]
    if not given:
        return None
    missing = [name for name in _PHYSICAL_TABLES if name not in values]
    if missing:
        raise ConfigError(
            f"{where}: physical mode needs all three tables optics, platform and station; "
            f"{' and '.join(missing)} missing (or give none of them for fixed-rate mode)"
        )
    fixed = sorted(set(values) & _FIXED_ONLY)
    if fixed:
        hint = " (set in [defaults])" if set(fixed) <= defaulted else ""
        raise ConfigError(
            f"{where}: a physical link (optics, platform, station) takes no fixed-rate "
            f"key: remove {', '.join(fixed)}{hint}; the link model and station.clear_sky "
            "decide rate, QBER and clouds"
        )
    tables = {name: _table(where, name, values[name]) for name in _PHYSICAL_TABLES}
    qber_sd = _typed(f"{where}.qber_sd", values.get("qber_sd", 0.0), float)
    try:
        return PhysicalProfile(
            optics=tables["optics"],  # type: ignore[arg-type]
            platform=tables["platform"],  # type: ignore[arg-type]
            station=tables["station"],  # type: ignore[arg-type]
            qber_sd=qber_sd,
        )
    except ValueError as exc:
        raise ConfigError(f"{where}: {exc}") from None


def _fixed_args(where: str, values: dict[str, Any]) -> dict[str, float]:
    args = {
        name: _typed(f"{where}.{name}", values[name], float)
        for name in _MODEL_KEYS
        if name in values
    }
    if "base_rate_bps" not in args:
        raise ConfigError(
            f"{where}: missing key base_rate_bps (here or in [defaults]), or give the "
            "tables optics, platform and station for physical mode"
        )
    return args


def _link(where: str, values: dict[str, Any], base: Path, defaulted: set[str]) -> LinkSpec:
    unknown = sorted(set(values) - _LINK_KEYS)
    if unknown:
        raise ConfigError(f"{where}: unknown key(s) {', '.join(unknown)}")
    missing = sorted(_REQUIRED - set(values))
    if missing:
        raise ConfigError(f"{where}: missing key(s) {', '.join(missing)}")
    link_id = _typed(f"{where}.link_id", values["link_id"], str)
    for end in ("relay", "station"):
        url = _typed(f"{where}.{end}_url", values[f"{end}_url"], str)
        if not url.startswith(("https://", "http://")):
            raise ConfigError(f"{where}.{end}_url: must start with https://")
    profile = _physical(f"link {link_id}", values, defaulted)
    model_args = {} if profile is not None else _fixed_args(where, values)
    try:
        model = profile if profile is not None else ModelParams(**model_args)
        return LinkSpec(
            link_id=link_id,
            relay_url=values["relay_url"],
            station_url=values["station_url"],
            relay_identity=_identity(where, values, "relay", base),
            station_identity=_identity(where, values, "station", base),
            model=model,
            seed=_typed(f"{where}.seed", values.get("seed", zlib.crc32(link_id.encode())), int),
            block_bytes=_typed(f"{where}.block_bytes", values.get("block_bytes", 4096), int),
            epsilon=_typed(f"{where}.epsilon", values.get("epsilon", 1e-10), float),
        )
    except ValueError as exc:
        if isinstance(exc, ConfigError):
            raise
        raise ConfigError(f"{where}: {exc}") from exc


def _merged(defaults: dict[str, Any], values: dict[str, Any]) -> dict[str, Any]:
    """``defaults`` under ``values``; a physical table merges field by field."""
    out = defaults | values
    for name in _PHYSICAL_TABLES:
        low, high = defaults.get(name), values.get(name)
        if isinstance(low, dict) and isinstance(high, dict):
            out[name] = low | high
    return out


def parse_config(data: dict[str, Any], base: Path) -> EmulatorConfig:
    """Return the configuration described by parsed TOML ``data``.

    Raises:
        ConfigError: a key is unknown, missing, of the wrong type or out of range.
    """
    unknown = sorted(set(data) - {"emulator", "defaults", "link"})
    if unknown:
        raise ConfigError(f"unknown table(s) {', '.join(unknown)}")
    options: dict[str, Any] = {}
    for name, value in dict(data.get("emulator", {})).items():
        if name not in _EMULATOR_KEYS:
            raise ConfigError(f"emulator: unknown key {name}")
        options[name] = _typed(f"emulator.{name}", value, _EMULATOR_KEYS[name])
    if options.get("form", "binary") not in ("binary", "json"):
        raise ConfigError('emulator.form: must be "binary" or "json"')
    defaults = dict(data.get("defaults", {}))
    bad_defaults = sorted(set(defaults) & _REQUIRED)
    if bad_defaults:
        raise ConfigError(f"defaults: {', '.join(bad_defaults)} must be set per link")
    tables = data.get("link", [])
    if not isinstance(tables, list) or not tables:
        raise ConfigError("no [[link]] table: give at least one link")
    if not all(isinstance(t, dict) for t in tables):
        raise ConfigError("link: write each link as a [[link]] table")
    links = [
        _link(f"link[{i}]", _merged(defaults, t), base, set(defaults) - set(t))
        for i, t in enumerate(tables)
    ]
    seen: set[str] = set()
    for spec in links:
        if spec.link_id in seen:
            raise ConfigError(f"link_id {spec.link_id!r} appears twice")
        seen.add(spec.link_id)
    return EmulatorConfig(links=links, options=options)


def load_config(path: Path) -> EmulatorConfig:
    """Return the configuration in the TOML file at ``path``.

    Raises:
        ConfigError: the file cannot be read, is not TOML, or is wrong (see
            :func:`parse_config`).
    """
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read ({exc.strerror})") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc})") from exc
    return parse_config(data, path.resolve().parent)
