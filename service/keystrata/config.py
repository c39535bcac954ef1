"""Node settings: one TOML file plus ``KEYSTRATA_<SECTION>__<KEY>`` environment overrides.

Settings are built once at start (:func:`load_settings`) and passed down; nothing else in
the service reads the environment. A bad value stops the node with a
:class:`~keystrata.errors.ConfigError` naming the setting and how to fix it.

Example ``node.toml``::

    [node]
    id = "station-a"
    role = "station"            # relay | station

    [server]
    host = "127.0.0.1"
    port = 8443
    workers = 1

    [tls]
    ca = "pki/ca.crt"
    cert = "pki/station-a.crt"
    key = "pki/station-a.key"
    crl = "pki/crl.pem"         # optional: the CA's revocation list, re-read when it changes

    [database]
    url = "sqlite:///data/station-a.db"   # or postgresql://user@host/db

    [kek]
    file = "secrets/station-a.kek"

    [[peers]]
    id = "relay-1"
    url = "https://127.0.0.1:8440"

Relative paths are taken relative to the folder holding the TOML file.
"""

from __future__ import annotations

import os
import tomllib
from collections.abc import Mapping
from enum import StrEnum
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

from keystrata.errors import ConfigError
from keystrata.ids import ID_PATTERN

ENV_PREFIX = "KEYSTRATA_"
#: Where `keystrata serve` tells its worker processes which config file to load.
CONFIG_ENV = "KEYSTRATA_CONFIG"
#: Set by a supervisor that starts `keystrata serve` in a session of its own (the
#: loopback harness: tests, the demo, benchmarks, the load test) to its own process ID:
#: the node stops, as on SIGTERM, once that process is no longer its parent.
PARENT_ENV = "KEYSTRATA_STOP_WITH_PARENT"


class Role(StrEnum):
    RELAY = "relay"
    STATION = "station"


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class NodeSection(_Section):
    id: Annotated[str, Field(pattern=ID_PATTERN)]
    role: Role


class ServerSection(_Section):
    host: str = "127.0.0.1"
    port: Annotated[int, Field(ge=1, le=65535)] = 8443
    workers: Annotated[int, Field(ge=1, le=64)] = 1
    #: Read the client certificate from a header set by a TLS-terminating proxy.
    #: Off by default; only for deployments where the proxy is the sole way in.
    proxy_client_cert_header: str | None = None
    #: Run the background workers (outbox, relay scheduler, expiry) in this process.
    #: Tests that drive them by hand turn this off.
    background_work: bool = True
    #: How long an idle keep-alive connection stays open. Encryptors keep one connection
    #: and may pause between requests; closing it under them races with their next
    #: request (the client sees the connection drop and cannot know whether a Get key
    #: was served). Longer than common client idle timeouts (common practice).
    keep_alive_seconds: Annotated[int, Field(ge=1, le=3600)] = 75


class TlsSection(_Section):
    ca: Path
    cert: Path
    key: Path
    #: The CA's revocation list (``keystrata pki revoke`` writes it). When set, every
    #: handshake and every request checks the client certificate against it, and a new
    #: file is picked up without a restart.
    crl: Path | None = None


class DatabaseSection(_Section):
    url: str
    #: SQLite ``synchronous`` pragma: FULL survives power loss, NORMAL only process crashes.
    sqlite_synchronous: Literal["FULL", "NORMAL"] = "FULL"
    pool_size: Annotated[int, Field(ge=1, le=200)] = 10
    #: The node refuses to start when the database can lose a committed transaction on
    #: power loss (SQLite synchronous below FULL; PostgreSQL synchronous_commit, fsync or
    #: full_page_writes off): a Get key whose answer already left could be rolled back
    #: and its bytes served again. True starts it anyway, with a WARNING at every start,
    #: a marked readiness check and the ``keystrata_durability_override`` gauge.
    accept_data_loss_on_power_failure: bool = False

    @field_validator("url")
    @classmethod
    def _known_backend(cls, v: str) -> str:
        if not v.startswith(("sqlite:", "sqlite+pysqlite:", "postgresql:", "postgresql+psycopg:")):
            raise ValueError("must start with sqlite:/// or postgresql://")
        return v


class RestoreCheckSection(_Section):
    """A station compares its pairs' consumption points with each partner's (restore
    detection, restore/comparison.py): at start and every ``interval_seconds``."""

    interval_seconds: Annotated[float, Field(gt=0, le=86_400)] = 30.0
    #: Longest wait for a partner's answer (at start the node waits this long per pair).
    peer_timeout_seconds: Annotated[float, Field(gt=0, le=60)] = 3.0


class KekSection(_Section):
    file: Path
    #: During a key-encryption-key rotation: the previous KEK, still able to open old rows.
    previous_file: Path | None = None


class PeerSection(_Section):
    id: Annotated[str, Field(pattern=ID_PATTERN)]
    url: Annotated[str, Field(pattern=r"^https://")]


class PeerChecksSection(_Section):
    """``[peer]``: what a node checks with the peers of its ``[[peers]]`` entries."""

    #: How often the registry facts shared with each peer are compared with the peer's
    #: (node/registry_watch.py).
    registry_compare_seconds: Annotated[float, Field(gt=0, le=86_400)] = 60.0


class IngestSection(_Section):
    max_block_bytes: Annotated[int, Field(ge=32, le=16 * 1024 * 1024)] = 1024 * 1024
    max_request_bytes: Annotated[int, Field(ge=1024, le=256 * 1024 * 1024)] = 16 * 1024 * 1024
    max_blocks_per_request: Annotated[int, Field(ge=1, le=100_000)] = 4096
    rate_window_seconds: Annotated[int, Field(ge=10, le=86_400)] = 300


class RelaySection(_Section):
    """The relay's scheduler: how it turns link key into pair key."""

    segment_bytes: Annotated[int, Field(ge=64, le=64 * 1024 * 1024)] = 262_144
    min_segment_bytes: Annotated[int, Field(ge=32, le=64 * 1024 * 1024)] = 4096
    #: Ready key a pair should hold, in seconds of its measured consumption.
    horizon_seconds: Annotated[float, Field(gt=0, le=7 * 86_400)] = 600.0
    cycle_seconds: Annotated[float, Field(gt=0, le=3600)] = 1.0
    #: Segments a pair may have on their way (made, not yet settled) at once.
    max_in_flight_segments: Annotated[int, Field(ge=1, le=10_000)] = 16


class SegmentsSection(_Section):
    """A station's handling of segments."""

    #: A segment not confirmed by the partner station within this time is discarded.
    confirm_timeout_seconds: Annotated[float, Field(gt=0, le=7 * 86_400)] = 900.0


class OutboxSection(_Section):
    batch: Annotated[int, Field(ge=1, le=10_000)] = 64
    idle_seconds: Annotated[float, Field(gt=0, le=60)] = 0.2
    #: After a round that delivered something, wait this long before the next, so that
    #: under load messages go in batches and the outbox's own transactions (claim and
    #: settle, two commits per round) leave room for the requests'. A message after a
    #: quiet spell still goes at once (the commit that queued it wakes the loop).
    linger_seconds: Annotated[float, Field(ge=0, le=5)] = 0.05
    timeout_seconds: Annotated[float, Field(gt=0, le=300)] = 10.0
    #: Longest wait between two attempts at one message (backoff doubles up to it).
    max_backoff_seconds: Annotated[float, Field(gt=0, le=3600)] = 30.0


class LedgerSection(_Section):
    """When the node signs a checkpoint of its ledger: after this many seconds or this
    many new entries, whichever comes first (and only if there are new entries)."""

    checkpoint_seconds: Annotated[float, Field(gt=0, le=86_400)] = 60.0
    checkpoint_entries: Annotated[int, Field(ge=1, le=10_000_000)] = 1000
    #: Refused requests of one certificate subject, reason and route: one ``auth.refused``
    #: entry at once, the rest of this interval counted into the next entry (per worker
    #: process), so that a stranger cannot force a ledger write (an fsync) per request.
    refusal_interval_seconds: Annotated[float, Field(ge=0, le=3600)] = 60.0


class DashboardSection(_Section):
    """The operators' dashboard: its history samples every ``sample_seconds`` and keeps
    ``retention_days`` of them (node/history.py)."""

    sample_seconds: Annotated[float, Field(ge=1, le=3600)] = 30.0
    retention_days: Annotated[float, Field(gt=0, le=366)] = 7.0


class Settings(_Section):
    node: NodeSection
    server: ServerSection = ServerSection()
    tls: TlsSection
    database: DatabaseSection
    kek: KekSection
    peers: list[PeerSection] = []
    peer: PeerChecksSection = PeerChecksSection()
    ingest: IngestSection = IngestSection()
    relay: RelaySection = RelaySection()
    segments: SegmentsSection = SegmentsSection()
    outbox: OutboxSection = OutboxSection()
    ledger: LedgerSection = LedgerSection()
    restore_check: RestoreCheckSection = RestoreCheckSection()
    dashboard: DashboardSection = DashboardSection()
    #: Folder of the TOML file; relative paths above were resolved against it.
    base_dir: Path = Path(".")


_FIXES: dict[str, str] = {
    "node.id": "use 1-64 letters, digits, '.', '_' or '-', starting with a letter or digit",
    "node.role": 'set role = "relay" or role = "station"',
    "database.url": "give an SQLAlchemy URL such as sqlite:///data/node.db or "
    "postgresql://user@127.0.0.1/keystrata",
    "tls.ca": "point it at the network CA certificate (PEM); `keystrata pki init` makes one",
    "kek.file": "point it at the node's 32-byte key-encryption-key file; "
    "`keystrata kek new` makes one",
}


def _env_overrides(env: Mapping[str, str]) -> dict[str, dict[str, str]]:
    out: dict[str, dict[str, str]] = {}
    for name, value in env.items():
        if not name.startswith(ENV_PREFIX) or "__" not in name or name == CONFIG_ENV:
            continue
        section, _, key = name[len(ENV_PREFIX) :].lower().partition("__")
        if section == "peers":
            raise ConfigError(
                f"setting {name}: peers cannot be set from the environment; "
                "list them as [[peers]] in the TOML file"
            )
        out.setdefault(section, {})[key] = value
    return out


def _resolve_paths(raw: dict[str, Any], base: Path) -> None:
    for section, keys in (
        ("tls", ("ca", "cert", "key", "crl")),
        ("kek", ("file", "previous_file")),
    ):
        sect = raw.get(section)
        if not isinstance(sect, dict):
            continue
        for key in keys:
            if isinstance(sect.get(key), str) and not os.path.isabs(sect[key]):
                sect[key] = str(base / sect[key])
    db = raw.get("database")
    if isinstance(db, dict) and isinstance(db.get("url"), str):
        url: str = db["url"]
        for prefix in ("sqlite:///", "sqlite+pysqlite:///"):
            rest = url[len(prefix) :]
            if url.startswith(prefix) and rest and not rest.startswith("/") and rest != ":memory:":
                db["url"] = prefix + str(base / rest)


def _explain(exc: ValidationError, source: str) -> ConfigError:
    lines = []
    for err in exc.errors():
        setting = ".".join(str(p) for p in err["loc"])
        section, _, key = setting.partition(".")
        where = f"[{section}] {key} in {source} or {ENV_PREFIX}{section.upper()}__{key.upper()}"
        fix = _FIXES.get(setting, "")
        if err["type"] == "missing":
            msg = "is required"
        elif err["type"] == "extra_forbidden":
            msg = "is not a known setting (check the spelling)"
        else:
            msg = err["msg"].removeprefix("Value error, ")
        lines.append(f"setting {setting}: {msg}; set {where}" + (f" ({fix})" if fix else ""))
    return ConfigError("\n".join(lines))


def load_settings(path: Path | str, env: Mapping[str, str] | None = None) -> Settings:
    """Read a node's TOML file, apply environment overrides and validate.

    Returns:
        The validated, immutable settings.

    Raises:
        ConfigError: the file is missing or unreadable, or a value is invalid. The message
            names each bad setting and the fix.
    """
    path = Path(path)
    try:
        raw: dict[str, Any] = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise ConfigError(f"config file {path} does not exist; pass --config PATH") from exc
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise ConfigError(f"config file {path} cannot be read: {exc}") from exc
    for section, values in _env_overrides(os.environ if env is None else env).items():
        target = raw.setdefault(section, {})
        if not isinstance(target, dict):
            raise ConfigError(f"setting {section}: must be a table in {path}")
        target.update(values)
    base = path.resolve().parent
    _resolve_paths(raw, base)
    raw["base_dir"] = str(base)
    try:
        return Settings.model_validate(raw)
    except ValidationError as exc:
        raise _explain(exc, str(path)) from None
