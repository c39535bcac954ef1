"""The network description: one TOML file that describes a whole keystrata network.

It names the relays (with their platform) and stations (with their site and sky), the
QKD links between them (with their optics and QKD module), the SAEs of each station,
the station pairs with their policy, and the people and systems that call the nodes
(operators, auditors, monitors). Named ``[policies.NAME]`` and ``[optics.NAME]`` tables
let pairs and links share values; an inline table may start from one with ``extends``.
Paths are relative to the file. The format is documented in the README ("One network
description") and an example is written by ``keystrata demo`` to its workdir.

:func:`load` reads and checks the file: its shape, every reference (a link's relay is
a relay of the file, a pair's stations each have a link to its relay), and the physical
profiles against the link model's own checks. Values the nodes check themselves (key
sizes, buffer figures) are left to them: their 400s name the field.
"""

from __future__ import annotations

import hashlib
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from cryptography import x509
from cryptography.hazmat.primitives.serialization import Encoding
from cryptography.x509.oid import NameOID

from keystrata_client._errors import KeystrataClientError
from keystrata_physics import optics as physics

NodeRole = Literal["relay", "station"]
PersonRole = Literal["operator", "auditor", "monitor"]
#: People and systems whose principals must pin their certificate (the nodes refuse
#: an operator without ``cert_sha256``); peers are always pinned.
PINNED: frozenset[str] = frozenset({"operator"})


class DescriptionError(KeystrataClientError):
    """The description cannot be used; the message names the file and the place."""


@dataclass(frozen=True)
class Certificate:
    """Who a certificate names: its subject common name and SHA-256 pin (DER)."""

    subject: str
    sha256: str | None


@dataclass(frozen=True)
class NodeEntry:
    node_id: str
    role: NodeRole
    url: str | None
    description: str
    physical: dict[str, Any] | None
    certificate: Certificate


@dataclass(frozen=True)
class SaeEntry:
    sae_id: str
    station: str
    certificate: Certificate
    description: str


@dataclass(frozen=True)
class LinkEntry:
    link_id: str
    relay: str
    station: str
    description: str
    optics: dict[str, Any] | None
    module_id: str
    module: Certificate


@dataclass(frozen=True)
class PairEntry:
    pair_id: str
    relay: str
    stations: tuple[str, str]
    policy: dict[str, Any]


@dataclass(frozen=True)
class PersonEntry:
    principal_id: str
    role: PersonRole
    certificate: Certificate
    description: str


@dataclass(frozen=True)
class Access:
    """The certificate files the description's commands present (the operator's own)."""

    ca: Path | None
    cert: Path | None
    key: Path | None


@dataclass(frozen=True)
class Network:
    name: str
    path: Path
    access: Access
    nodes: dict[str, NodeEntry]
    links: dict[str, LinkEntry]
    pairs: dict[str, PairEntry]
    saes: dict[str, SaeEntry]
    people: dict[str, PersonEntry]
    comments: list[str] = field(default_factory=list)

    def stations(self) -> list[NodeEntry]:
        return [n for n in self.nodes.values() if n.role == "station"]

    def relays(self) -> list[NodeEntry]:
        return [n for n in self.nodes.values() if n.role == "relay"]


def certificate_of(path: Path) -> Certificate:
    """Read a PEM certificate: its subject common name and the SHA-256 of its DER form.

    Raises:
        DescriptionError: the file is missing or holds no PEM certificate.
    """
    try:
        cert = x509.load_pem_x509_certificate(path.read_bytes())
    except OSError as exc:
        raise DescriptionError(f"{path}: cannot read it ({exc.strerror})") from None
    except ValueError:
        raise DescriptionError(f"{path}: not a PEM certificate") from None
    names = cert.subject.get_attributes_for_oid(NameOID.COMMON_NAME)
    if not names:
        raise DescriptionError(f"{path}: the certificate's subject has no common name")
    return Certificate(
        str(names[0].value), hashlib.sha256(cert.public_bytes(Encoding.DER)).hexdigest()
    )


class _Reader:
    """Reads one table, knowing where it is, so every error names its place."""

    def __init__(self, path: Path, where: str, table: Mapping[str, Any]) -> None:
        self.path = path
        self.where = where
        self.table = dict(table)
        self.used: set[str] = set()

    def fail(self, name: str | None, problem: str) -> DescriptionError:
        place = f"{self.where}.{name}" if name else self.where
        return DescriptionError(f"{self.path.name}: {place}: {problem}")

    def _get(self, name: str, kinds: tuple[type, ...], what: str, default: Any) -> Any:
        self.used.add(name)
        if name not in self.table:
            if default is _REQUIRED:
                raise self.fail(name, "missing")
            return default
        value = self.table[name]
        if not isinstance(value, kinds) or (isinstance(value, bool) and bool not in kinds):
            raise self.fail(name, f"must be {what}")
        return value

    def text(self, name: str, default: Any = "") -> Any:
        return self._get(name, (str,), "a string", default)

    def table_of(self, name: str) -> dict[str, Any] | str | None:
        return self._get(name, (dict, str), "a table or the name of one", None)  # type: ignore[no-any-return]

    def strings(self, name: str) -> list[str]:
        value = self._get(name, (list,), "a list of strings", _REQUIRED)
        if not all(isinstance(v, str) for v in value):
            raise self.fail(name, "must be a list of strings")
        return list(value)

    def child(self, name: str) -> _Reader:
        value = self._get(name, (dict,), "a table", {})
        return _Reader(self.path, f"{self.where}.{name}", value)

    def file(self, name: str) -> Path | None:
        value = self.text(name, None)
        return None if value is None else (self.path.parent / value).resolve()

    def done(self) -> None:
        unknown = sorted(set(self.table) - self.used)
        if unknown:
            raise self.fail(unknown[0], "unknown member (a typo?)")

    def certificate(self, default_subject: str | None, pinned: bool) -> Certificate:
        """``certificate = "file"``, or ``cert_subject`` and ``cert_sha256``."""
        cert_file = self.file("certificate")
        subject = self.text("cert_subject", None)
        pin = self.text("cert_sha256", None)
        if cert_file is not None:
            if subject is not None or pin is not None:
                raise self.fail("certificate", "give a certificate file or cert_subject, not both")
            try:
                return certificate_of(cert_file)
            except DescriptionError as exc:
                raise self.fail("certificate", str(exc)) from None
        if pin is not None and (len(pin) != 64 or pin.strip("0123456789abcdef")):
            raise self.fail("cert_sha256", "must be 64 lower-case hex digits")
        if pinned and pin is None:
            raise self.fail(
                None, "needs its certificate file (certificate = ...) or cert_sha256, for the pin"
            )
        subject = subject if subject is not None else default_subject
        if subject is None:
            raise self.fail("cert_subject", "missing")
        return Certificate(subject, pin)


_REQUIRED = object()
_TOP = ("network", "relays", "stations", "links", "pairs", "policies", "optics", "people")


def _named(
    reader: _Reader, name: str, shared: Mapping[str, Any], what: str
) -> dict[str, Any] | None:
    """A table given inline (optionally ``extends = "NAME"``) or as the name of one."""
    value = reader.table_of(name)
    if value is None:
        return None
    if isinstance(value, str):
        if value not in shared:
            raise reader.fail(name, f"no [{what}.{value}] table in this file")
        return dict(shared[value])
    own = dict(value)
    base = own.pop("extends", None)
    if base is None:
        return own
    if not isinstance(base, str) or base not in shared:
        raise reader.fail(f"{name}.extends", f"must name a [{what}.NAME] table of this file")
    return dict(shared[base]) | own


def _check_profile(reader: _Reader, name: str, record: Any, values: dict[str, Any] | None) -> None:
    if values is None:
        return
    try:
        physics.from_mapping(record, values)
    except ValueError as exc:
        raise reader.fail(name, str(exc)) from None


def _tables(root: _Reader, name: str) -> dict[str, _Reader]:
    section = root.child(name)
    out = {}
    for key, value in section.table.items():
        if not isinstance(value, dict):
            raise section.fail(key, "must be a table")
        section.used.add(key)
        out[key] = _Reader(root.path, f"{name}.{key}", value)
    return out


def load(path: Path) -> Network:
    """Read and check a network description.

    Raises:
        DescriptionError: the file cannot be read, is not TOML, or is not a consistent
            description; the message names the file, the place and the problem.
    """
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise DescriptionError(f"{path}: cannot read it ({exc.strerror})") from None
    except tomllib.TOMLDecodeError as exc:
        raise DescriptionError(f"{path.name}: not valid TOML: {exc}") from None
    root = _Reader(path, "", data)
    root.where = path.name
    head = root.child("network")
    access = Access(head.file("ca"), head.file("cert"), head.file("key"))
    name = head.text("name", path.stem)
    head.done()
    policies = {k: r.table for k, r in _tables(root, "policies").items()}
    optics = {k: r.table for k, r in _tables(root, "optics").items()}
    nodes: dict[str, NodeEntry] = {}
    saes: dict[str, SaeEntry] = {}
    for role, section in (("relay", "relays"), ("station", "stations")):
        for node_id, r in _tables(root, section).items():
            if node_id in nodes:
                raise r.fail(None, "a node of this ID is already described")
            profile = r.table_of("platform" if role == "relay" else "site")
            if isinstance(profile, str):
                raise r.fail("platform" if role == "relay" else "site", "must be a table")
            _check_profile(
                r,
                "platform" if role == "relay" else "site",
                physics.Platform if role == "relay" else physics.StationSky,
                profile,
            )
            url = r.text("url", None)
            if url is not None and not url.startswith("https://"):
                raise r.fail("url", "must be the node's https:// base URL")
            nodes[node_id] = NodeEntry(
                node_id,
                role,  # type: ignore[arg-type]
                url.rstrip("/") if url else None,
                r.text("description"),
                profile,
                r.certificate(node_id, pinned=True),
            )
            if role == "station":
                for sae_id, s in _tables(r, "saes").items():
                    if sae_id in saes:
                        raise s.fail(None, "an SAE of this ID is already described")
                    saes[sae_id] = SaeEntry(
                        sae_id, node_id, s.certificate(sae_id, False), s.text("description")
                    )
                    s.done()
            r.done()
    links: dict[str, LinkEntry] = {}
    for link_id, r in _tables(root, "links").items():
        relay, station = r.text("relay", _REQUIRED), r.text("station", _REQUIRED)
        for end, role in ((relay, "relay"), (station, "station")):
            if end not in nodes or nodes[end].role != role:
                raise r.fail(role, f"{end!r} is not a {role} of this description")
        profile = _named(r, "optics", optics, "optics")
        _check_profile(r, "optics", physics.LinkOptics, profile)
        module = r.child("module")
        module_id = module.text("id", f"qkd-{link_id}")
        links[link_id] = LinkEntry(
            link_id,
            relay,
            station,
            r.text("description"),
            profile,
            module_id,
            module.certificate(module_id, False),
        )
        module.done()
        r.done()
    pairs = _pairs(root, nodes, links, policies)
    people: dict[str, PersonEntry] = {}
    for principal_id, r in _tables(root, "people").items():
        role = r.text("role", _REQUIRED)
        if role not in ("operator", "auditor", "monitor"):
            raise r.fail("role", "must be operator, auditor or monitor")
        people[principal_id] = PersonEntry(
            principal_id, role, r.certificate(principal_id, role in PINNED), r.text("description")
        )
        r.done()
    root.used.update(_TOP)
    root.done()
    _unique_subjects(path, nodes, saes, links, people)
    return Network(name, path, access, nodes, links, pairs, saes, people)


def _pairs(
    root: _Reader,
    nodes: Mapping[str, NodeEntry],
    links: Mapping[str, LinkEntry],
    policies: Mapping[str, Any],
) -> dict[str, PairEntry]:
    pairs: dict[str, PairEntry] = {}
    joined: dict[tuple[str, str, str], str] = {}
    for pair_id, r in _tables(root, "pairs").items():
        relay = r.text("relay", _REQUIRED)
        if relay not in nodes or nodes[relay].role != "relay":
            raise r.fail("relay", f"{relay!r} is not a relay of this description")
        stations = r.strings("stations")
        if len(stations) != 2 or stations[0] == stations[1]:
            raise r.fail("stations", "must name two different stations")
        for i, station in enumerate(stations):
            if station not in nodes or nodes[station].role != "station":
                raise r.fail(f"stations.{i}", f"{station!r} is not a station of this description")
            if not any(k.relay == relay and k.station == station for k in links.values()):
                raise r.fail(f"stations.{i}", f"{station!r} has no QKD link to {relay!r}")
        a, b = sorted(stations)
        if (relay, a, b) in joined:
            raise r.fail("stations", f"{joined[relay, a, b]} already joins {a} and {b}")
        joined[relay, a, b] = pair_id
        policy = _named(r, "policy", policies, "policies") or {}
        pairs[pair_id] = PairEntry(pair_id, relay, (stations[0], stations[1]), policy)
        r.done()
    return pairs


def _unique_subjects(
    path: Path,
    nodes: Mapping[str, NodeEntry],
    saes: Mapping[str, SaeEntry],
    links: Mapping[str, LinkEntry],
    people: Mapping[str, PersonEntry],
) -> None:
    """A certificate subject names one principal on a node: no two entries may share one
    (a link's QKD module pair shares its subject by design: one entry per link)."""
    seen: dict[str, str] = {}
    named = (
        [(f"relays/stations.{n.node_id}", n.certificate.subject) for n in nodes.values()]
        + [(f"saes.{s.sae_id}", s.certificate.subject) for s in saes.values()]
        + [(f"links.{k.link_id}.module", k.module.subject) for k in links.values()]
        + [(f"people.{p.principal_id}", p.certificate.subject) for p in people.values()]
    )
    for where, subject in named:
        if subject in seen:
            raise DescriptionError(
                f"{path.name}: {where}: certificate subject {subject!r} is also that of "
                f"{seen[subject]}"
            )
        seen[subject] = where
