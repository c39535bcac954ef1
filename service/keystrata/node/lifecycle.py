"""Bringing a node's database to life (init) and checking it at start (open)."""

from __future__ import annotations

import logging

from sqlalchemy import select
from sqlalchemy.orm import Session

from keystrata import __version__
from keystrata.clock import Clock, SystemClock
from keystrata.config import Settings
from keystrata.context import NodeContext
from keystrata.crypto.hazmat import Keyring, generate_signing_key, random_bytes
from keystrata.crypto.kek import read_kek
from keystrata.errors import ConfigError, SealBroken, StartupRefused
from keystrata.ledger import chain
from keystrata.ledger.entries import Event
from keystrata.node import reseal
from keystrata.storage import migrate, sealed
from keystrata.storage.db import Database, DurabilityRisk, durability_risks
from keystrata.storage.models import NodeMeta, RegistryNode
from keystrata.storage.sealed import meta_context

log = logging.getLogger("keystrata.node")

KEK_CHECK_PLAINTEXT = b"keystrata key-encryption-key check v1"
OVERRIDE_SETTING = "accept_data_loss_on_power_failure"
ROTATION_MARK = "kek_rotation_target"


def load_keyring(settings: Settings) -> Keyring:
    """Read the KEK (and the previous one, mid-rotation) with permission checks."""
    current = read_kek(settings.kek.file)
    older = [read_kek(settings.kek.previous_file)] if settings.kek.previous_file else []
    return Keyring(current, older)


def _meta(session: Session, name: str) -> bytes | None:
    row = session.get(NodeMeta, name)
    return None if row is None else row.value


def check_kek(session: Session, keyring: Keyring) -> None:
    """Raise StartupRefused unless ``keyring`` opens the stored KEK check value."""
    sealed = _meta(session, "kek_check")
    if sealed is None:
        raise StartupRefused("this database was never initialised; run `keystrata node init`")
    try:
        value = keyring.open(sealed, meta_context("kek_check"))
    except SealBroken as exc:
        raise StartupRefused(
            "the key-encryption key does not match this database (wrong [kek] file?)"
        ) from exc
    if value != KEK_CHECK_PLAINTEXT:
        raise StartupRefused("the key-encryption-key check value is corrupt")


def _check_identity(session: Session, settings: Settings) -> None:
    node_id, role = _meta(session, "node_id"), _meta(session, "node_role")
    if node_id != settings.node.id.encode() or role != settings.node.role.value.encode():
        raise StartupRefused(
            f"this database does not belong to node {settings.node.id!r} "
            f"({settings.node.role.value}); check [node] id and role"
        )


def initialise(
    settings: Settings, db: Database, keyring: Keyring, clock: Clock | None = None
) -> bool:
    """Migrate the schema and create this node's secrets and registry row.

    Idempotent: on an initialised database it only checks the KEK.

    Returns:
        True when the node was initialised now, False when it already was.
    Raises:
        StartupRefused: the database belongs to another KEK or another node.
    """
    clock = clock or SystemClock()
    migrate.upgrade(db.engine)
    with db.write() as s:
        if _meta(s, "kek_check") is not None:
            check_kek(s, keyring)
            _check_identity(s, settings)
            return False
        now = clock.now()
        for name, value in (
            ("kek_check", KEK_CHECK_PLAINTEXT),
            ("fingerprint_key", random_bytes(32)),
            ("ledger_signing_key", generate_signing_key()),
        ):
            s.add(NodeMeta(name=name, value=keyring.seal(value, meta_context(name))))
        s.add(NodeMeta(name="node_id", value=settings.node.id.encode()))
        s.add(NodeMeta(name="node_role", value=settings.node.role.value.encode()))
        s.add(NodeMeta(name=sealed.LAYOUT_META, value=str(sealed.LAYOUT).encode()))
        s.add(
            RegistryNode(
                node_id=settings.node.id,
                role=settings.node.role.value,
                url=None,
                description="this node",
                created_at=now,
                updated_at=now,
            )
        )
        chain.append(
            s,
            node_id=settings.node.id,
            at=now,
            event=Event.NODE_INITIALISED,
            fields={"role": settings.node.role.value, "version": __version__},
        )
    return True


def describe_risks(risks: list[DurabilityRisk]) -> str:
    """The risks in fixed words: setting names and the values in force."""
    return ", ".join(f"{r.setting}={r.value}" for r in risks)


def check_durability(settings: Settings, db: Database) -> list[DurabilityRisk]:
    """Refuse a database that can lose committed transactions on power loss, unless
    ``[database] accept_data_loss_on_power_failure`` says to start anyway (then log a
    WARNING). Returns the risks accepted by the override (empty when durable).

    Raises:
        ConfigError: an unsafe setting is in force and the override is not set.
    """
    risks = durability_risks(db.engine)
    if not risks:
        return []
    if not settings.database.accept_data_loss_on_power_failure:
        fixes = "; ".join(f"{r.setting} is {r.value}: {r.fix}" for r in risks)
        raise ConfigError(
            f"setting database: the database can lose committed transactions on power "
            f"loss ({fixes}); a lost Get key would hand the same key bytes out again. "
            f"Fix the setting, or set [database] {OVERRIDE_SETTING} = true to start anyway"
        )
    log.warning(
        "durability guard overridden by [database] %s: %s; a power loss can undo "
        "committed key deliveries and serve their bytes again",
        OVERRIDE_SETTING,
        describe_risks(risks),
    )
    return risks


def open_node(settings: Settings, db: Database, clock: Clock | None = None) -> NodeContext:
    """Run every start-up check and return the node's context.

    Raises:
        StartupRefused: KEK file unsafe or wrong, schema not at the current revision, a
            KEK rotation left unfinished, or the database belongs to another node.
        ConfigError: the database is not durable on power loss and the override is unset.
    """
    check_durability(settings, db)
    keyring = load_keyring(settings)
    current, head = migrate.current_revision(db.engine), migrate.head_revision(db.engine)
    if current != head:
        raise StartupRefused(
            f"database schema is at revision {current}, this version needs {head}; "
            "run `keystrata db upgrade --config ...`"
        )
    with db.read() as s:
        check_kek(s, keyring)
        if _meta(s, ROTATION_MARK) is not None and settings.kek.previous_file is None:
            raise StartupRefused(
                "a key-encryption-key rotation is unfinished; complete it with "
                "`keystrata kek rotate` before starting the node"
            )
        _check_identity(s, settings)
        fingerprint_sealed = s.execute(
            select(NodeMeta.value).where(NodeMeta.name == "fingerprint_key")
        ).scalar_one()
    fingerprint_key = keyring.open(fingerprint_sealed, meta_context("fingerprint_key"))
    reseal.reseal(db, keyring)  # pair key sealed before layout 2 (storage/sealed.py)
    return NodeContext(
        settings=settings,
        db=db,
        keyring=keyring,
        fingerprint_key=fingerprint_key,
        clock=clock or SystemClock(),
    )
