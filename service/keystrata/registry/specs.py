"""What operators provision: nodes, QKD links, station pairs with their policy, and
principals (every caller, SAEs included). Input shapes and the rules that need no
database; rules that need one (does the station exist?) live in the service layer.

Types are strict: JSON ``true`` is not a number and ``"8"`` is not an integer.
"""

from __future__ import annotations

from enum import StrEnum
from typing import Annotated, Any, ClassVar, Self

from pydantic import BaseModel, ConfigDict, Field, StringConstraints, model_validator

from keystrata.errors import InvalidInput
from keystrata.ids import ID_PATTERN
from keystrata_physics import optics as physics

Ident = Annotated[str, StringConstraints(strict=True, pattern=ID_PATTERN)]
Text = Annotated[str, StringConstraints(strict=True, max_length=1000)]
Url = Annotated[str, StringConstraints(strict=True, pattern=r"^https://[^\s]{1,247}$")]
Subject = Annotated[
    str, StringConstraints(strict=True, min_length=1, max_length=255, pattern=r"^[^\x00-\x1f]+$")
]
Sha256Hex = Annotated[str, StringConstraints(strict=True, pattern=r"^[0-9a-f]{64}$")]
Bits = Annotated[int, Field(strict=True, ge=0, le=2**53)]
KeySize = Annotated[int, Field(strict=True, ge=8, le=1_048_576, multiple_of=8)]


class Kind(StrEnum):
    NODES = "nodes"
    LINKS = "links"
    PAIRS = "pairs"
    PRINCIPALS = "principals"


class NodeRole(StrEnum):
    RELAY = "relay"
    STATION = "station"


class PrincipalRole(StrEnum):
    SAE = "sae"
    OPERATOR = "operator"
    AUDITOR = "auditor"
    PEER = "peer"
    QKD_MODULE = "qkd-module"
    MONITOR = "monitor"  # health, readiness and metrics only


# Enumerations come as strings in JSON; strict mode would demand the Python enum itself.
NodeRoleIn = Annotated[NodeRole, Field(strict=False)]
PrincipalRoleIn = Annotated[PrincipalRole, Field(strict=False)]


class _Input(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)


#: A physical profile as JSON: a platform (relay), a station's site and sky, or a link's
#: optics (keystrata_physics.optics); checked by :func:`check_physical`.
Profile = Annotated[dict[str, Any], Field(max_length=64)]


def check_physical(kind: str, values: dict[str, Any] | None) -> None:
    """Check a physical profile: ``kind`` is ``relay``, ``station`` or ``link``.

    Raises:
        InvalidInput: an unknown name or a value out of range; the details name the field
            (``physical.latitude_deg``, ``optics.rx_aperture_m``).
    """
    if values is None:
        return
    record: Any
    record, prefix = {
        "relay": (physics.Platform, "physical"),
        "station": (physics.StationSky, "physical"),
        "link": (physics.LinkOptics, "optics"),
    }[kind]
    try:
        physics.from_mapping(record, values)
    except ValueError as exc:
        message = str(exc)
        name = message.split(" ", 1)[0].strip("'")
        known = set(record.__dataclass_fields__)
        if message.startswith("unknown field"):
            name = message.split("'")[1]
        where = f"{prefix}.{name}" if name in known or message.startswith("unknown") else prefix
        raise InvalidInput(
            f"{where}: {message}", details=[{"field": where, "problem": message}]
        ) from None


class NodeSpec(_Input):
    node_id: Ident
    role: NodeRoleIn
    url: Url | None = None
    description: Text = ""
    physical: Profile | None = None

    @model_validator(mode="after")
    def _physical_fits_role(self) -> Self:
        check_physical(self.role.value, self.physical)
        return self


class _Change(_Input):
    """A partial change: fields left out keep their value. ``null`` clears a field only
    where an entry may lack it (a node's URL, a principal's certificate pin); for the
    fields in ``_not_null`` it is refused (400) rather than reaching a NOT NULL column."""

    _not_null: ClassVar[tuple[str, ...]] = ()

    @model_validator(mode="after")
    def _no_null_where_required(self) -> Self:
        for name in self._not_null:
            if name in self.model_fields_set and getattr(self, name) is None:
                raise ValueError(f"{name} cannot be null")
        return self


class NodeChange(_Change):
    """Checked against the node's role by the service (the role is in its row)."""

    _not_null = ("description",)
    url: Url | None = None
    description: Text | None = None
    physical: Profile | None = None


class LinkSpec(_Input):
    link_id: Ident
    relay_id: Ident
    station_id: Ident
    description: Text = ""
    optics: Profile | None = None

    @model_validator(mode="after")
    def _distinct_ends(self) -> Self:
        if self.relay_id == self.station_id:
            raise ValueError("relay_id and station_id must name two different nodes")
        check_physical("link", self.optics)
        return self


class LinkChange(_Change):
    _not_null = ("description",)
    description: Text | None = None
    optics: Profile | None = None

    @model_validator(mode="after")
    def _optics(self) -> Self:
        check_physical("link", self.optics)
        return self


class PairPolicy(_Input):
    """Per-pair policy. Sizes in bits; buffer figures in bits of ready key per station."""

    min_key_size: KeySize = 64
    max_key_size: KeySize = 8192
    default_key_size: KeySize = 256
    buffer_min_bits: Bits = 262_144
    buffer_target_bits: Bits = 1_048_576
    buffer_max_bits: Bits = 16_777_216
    daily_quota_bits: Annotated[int, Field(strict=True, gt=0, le=2**53)] | None = None
    priority: Annotated[int, Field(strict=True, ge=1, le=1000)] = 100
    max_epsilon: Annotated[float, Field(strict=True, gt=0, lt=1)] | None = None
    key_ttl_seconds: Annotated[int, Field(strict=True, ge=1, le=30 * 86_400)] = 3600
    #: SAEs that may take this pair's key as master (Get key) and be named as slaves
    #: (Get key with key IDs); null: every active SAE of the pair's two stations.
    masters: Annotated[list[Ident], Field(max_length=1024)] | None = None
    slaves: Annotated[list[Ident], Field(max_length=1024)] | None = None
    #: Bits of this pair's key one master SAE may take per UTC day; null: no such quota.
    sae_daily_quota_bits: Annotated[int, Field(strict=True, gt=0, le=2**53)] | None = None

    @model_validator(mode="after")
    def _consistent(self) -> Self:
        for name in ("masters", "slaves"):
            saes = getattr(self, name)
            if saes is not None and len(set(saes)) != len(saes):
                raise ValueError(f"{name} must name each SAE once")
        if not self.min_key_size <= self.default_key_size <= self.max_key_size:
            raise ValueError(
                "key sizes must satisfy min_key_size <= default_key_size <= max_key_size"
            )
        if not self.buffer_min_bits <= self.buffer_target_bits <= self.buffer_max_bits:
            raise ValueError(
                "buffer must satisfy buffer_min_bits <= buffer_target_bits <= buffer_max_bits"
            )
        return self


class PairSpec(_Input):
    pair_id: Ident
    relay_id: Ident
    stations: Annotated[list[Ident], Field(min_length=2, max_length=2)]
    policy: PairPolicy = PairPolicy()

    @model_validator(mode="after")
    def _two_stations(self) -> Self:
        if self.stations[0] == self.stations[1]:
            raise ValueError("stations must name two different stations")
        if self.relay_id in self.stations:
            raise ValueError("the relay cannot also be one of the pair's stations")
        return self


class PairChange(_Input):
    """A partial policy: fields left out keep their value; the result is checked whole."""

    policy: dict[str, Any] = {}


#: Roles whose principals must pin their certificate (``cert_sha256``): a peer speaks for
#: a whole node and an operator changes the registry, so a second certificate with the
#: same common name (a CA mistake, a stolen CA key) must not be enough.
PINNED_ROLES = frozenset({PrincipalRole.PEER, PrincipalRole.OPERATOR})


def _pin_needed(role: PrincipalRole) -> str:
    return (
        f"a principal with role {role.value} needs cert_sha256, the SHA-256 fingerprint of "
        "its certificate (`keystrata pki show FILE` prints it)"
    )


def check_pin_kept(role: str, change: PrincipalChange) -> None:
    """Refuse a change that would clear the pin of a peer or operator.

    Raises InvalidInput (400).
    """
    principal_role = PrincipalRole(role)
    cleared = "cert_sha256" in change.model_fields_set and change.cert_sha256 is None
    if principal_role in PINNED_ROLES and cleared:
        raise InvalidInput(
            _pin_needed(principal_role), details=[{"field": "cert_sha256", "problem": "required"}]
        )


class PrincipalSpec(_Input):
    principal_id: Ident
    role: PrincipalRoleIn
    cert_subject: Subject
    cert_sha256: Sha256Hex | None = None
    station_id: Ident | None = None
    link_id: Ident | None = None
    node_id: Ident | None = None
    description: Text = ""

    @model_validator(mode="after")
    def _binding_matches_role(self) -> Self:
        if self.role in PINNED_ROLES and self.cert_sha256 is None:
            raise ValueError(_pin_needed(self.role))
        wanted = {
            PrincipalRole.SAE: "station_id",
            PrincipalRole.QKD_MODULE: "link_id",
            PrincipalRole.PEER: "node_id",
        }.get(self.role)
        for name in ("station_id", "link_id", "node_id"):
            given = getattr(self, name) is not None
            if name == wanted and not given:
                raise ValueError(f"a principal with role {self.role.value} needs {name}")
            if name != wanted and given:
                raise ValueError(
                    f"{name} is only for role "
                    + {"station_id": "sae", "link_id": "qkd-module", "node_id": "peer"}[name]
                )
        return self


class PrincipalChange(_Change):
    _not_null = ("cert_subject", "description")
    cert_subject: Subject | None = None
    cert_sha256: Sha256Hex | None = None
    description: Text | None = None
