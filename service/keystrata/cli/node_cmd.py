"""Local node administration: init, pin, schema, key-encryption key (`keystrata serve`
is :mod:`keystrata.cli.serve_cmd`)."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import click

from keystrata.cli import progress
from keystrata.cli.common import CommandError, config_option, handled, settings_from
from keystrata.config import Settings
from keystrata.crypto.certificates import fingerprint_sha256, subject_common_name
from keystrata.crypto.kek import read_kek, write_new_kek
from keystrata.errors import AlreadyExists, InvalidInput
from keystrata.node import kek_rotation
from keystrata.node.lifecycle import initialise, load_keyring, open_node
from keystrata.registry import provisioning
from keystrata.registry.specs import Kind, PrincipalChange, PrincipalRole, PrincipalSpec
from keystrata.storage import migrate
from keystrata.storage.db import Database


def _db(settings: Settings) -> Database:
    return Database.from_url(
        settings.database.url, sqlite_synchronous=settings.database.sqlite_synchronous
    )


@click.group("node")
def node() -> None:
    """Set up this node: initialise its database and secrets, pin principals."""


@node.command("init")
@config_option
@click.option(
    "--operator-subject", metavar="CN", help="Certificate subject (CN) of a first operator."
)
@click.option(
    "--operator-id",
    default="operator-1",
    show_default=True,
    help="Principal ID of that first operator.",
)
@click.option(
    "--operator-cert",
    type=click.Path(exists=True, dir_okay=False, path_type=Path),
    help="The first operator's certificate file: its SHA-256 becomes the pin.",
)
@click.option(
    "--operator-sha256",
    metavar="HEX",
    help="Or the pin itself: hex SHA-256 of the operator's certificate (DER).",
)
def node_init(
    config_path: Path,
    operator_subject: str | None,
    operator_id: str,
    operator_cert: Path | None,
    operator_sha256: str | None,
) -> None:
    """Create the database schema and this node's secrets; optionally add an operator.

    An operator is pinned to its certificate: give --operator-cert or --operator-sha256
    with --operator-subject. Safe to run again: an initialised node is only checked.
    """
    with handled():
        pin = _operator_pin(operator_subject, operator_cert, operator_sha256)
        settings = settings_from(config_path)
        db = _db(settings)
        created = initialise(settings, db, load_keyring(settings))
        click.echo(
            f"node {settings.node.id}: "
            + ("initialised" if created else "already initialised, checked")
        )
        if operator_subject:
            ctx = open_node(settings, db)
            try:
                provisioning.create(
                    ctx,
                    Kind.PRINCIPALS,
                    PrincipalSpec(
                        principal_id=operator_id,
                        role=PrincipalRole.OPERATOR,
                        cert_subject=operator_subject,
                        cert_sha256=pin,
                        description="first operator",
                    ),
                    actor="local-admin",
                )
                click.echo(f"operator {operator_id} ({operator_subject}) added")
            except AlreadyExists:
                click.echo(f"operator {operator_id} already present")


def _operator_pin(subject: str | None, cert: Path | None, sha256: str | None) -> str | None:
    """The pin of the first operator, checked against the subject when a file is given.

    Raises click.UsageError for a missing or doubled pin, InvalidInput for a file that is
    not a certificate or names another subject.
    """
    if subject is None:
        if cert is not None or sha256 is not None:
            raise click.UsageError("--operator-cert/--operator-sha256 need --operator-subject")
        return None
    return _pin(subject, cert, sha256, ("--operator-cert", "--operator-sha256"))


def _pin(subject: str, cert: Path | None, sha256: str | None, flags: tuple[str, str]) -> str:
    """The pin given as a certificate file (its CN must be ``subject``) or as hex."""
    if (cert is None) == (sha256 is None):
        raise click.UsageError(f"give exactly one of {flags[0]} FILE or {flags[1]}")
    if sha256 is not None:
        if not re.fullmatch(r"[0-9a-f]{64}", sha256.lower()):
            raise click.UsageError(f"{flags[1]} takes 64 hexadecimal digits")
        return sha256.lower()
    assert cert is not None
    data = cert.read_bytes()
    if subject_common_name(data) != subject:
        raise InvalidInput(f"{cert} is not a certificate of {subject!r} (its CN differs)")
    return fingerprint_sha256(data)


@node.command("pin")
@config_option
@click.option("--principal", "principal_id", required=True, help="The principal's ID.")
@click.option(
    "--cert",
    type=click.Path(exists=True, dir_okay=False, path_type=Path),
    help="The principal's certificate file: its SHA-256 becomes the pin.",
)
@click.option(
    "--sha256", metavar="HEX", help="Or the pin itself: hex SHA-256 of the certificate (DER)."
)
def node_pin(config_path: Path, principal_id: str, cert: Path | None, sha256: str | None) -> None:
    """Pin a principal to its certificate, on this node's database directly.

    Peers and operators must be pinned; one registered before pins were required is
    refused until it is (there may be no pinned operator left to do it over the API).
    Recorded in the ledger as a registry change by `local-admin`.
    """
    with handled():
        settings = settings_from(config_path)
        database = _db(settings)
        try:
            ctx = open_node(settings, database)
            row = provisioning.get(ctx, Kind.PRINCIPALS, principal_id)
            pin = _pin(str(row["cert_subject"]), cert, sha256, ("--cert", "--sha256"))
            provisioning.change(
                ctx,
                Kind.PRINCIPALS,
                principal_id,
                PrincipalChange(cert_sha256=pin),
                actor="local-admin",
            )
        finally:
            database.dispose()
        click.echo(f"principal {principal_id} pinned to {pin}")


@click.group("db")
def db() -> None:
    """The database schema: upgrade it, or show its revision."""


@db.command("upgrade")
@config_option
def db_upgrade(config_path: Path) -> None:
    """Apply pending schema migrations, one revision at a time."""
    with handled():
        engine = _db(settings_from(config_path)).engine
        pending = _pending_revisions(engine)
        with progress.bar("migrating the schema", len(pending)) as bar:
            for revision in pending:
                migrate.upgrade(engine, revision)
                bar.advance(1)
        migrate.upgrade(engine)  # nothing left, or a history the walk above cannot see
        click.echo(
            f"schema at revision {migrate.current_revision(engine)} "
            f"({len(pending)} {'migration' if len(pending) == 1 else 'migrations'} applied)"
        )


def _pending_revisions(engine: Any) -> list[str]:
    """The revisions between the database's and the newest, oldest first."""
    from alembic.config import Config
    from alembic.script import ScriptDirectory

    config = Config()
    config.set_main_option("script_location", "keystrata.storage:migrations")
    script = ScriptDirectory.from_config(config)
    current = migrate.current_revision(engine)
    walk = script.iterate_revisions("heads", current)
    return [r.revision for r in reversed(list(walk))]


@db.command("status")
@config_option
def db_status(config_path: Path) -> None:
    """Show the schema revision and whether it matches this version."""
    with handled():
        engine = _db(settings_from(config_path)).engine
        cur, head = migrate.current_revision(engine), migrate.head_revision(engine)
        click.echo(
            f"current {cur}, this version needs {head}: "
            + ("up to date" if cur == head else "run `keystrata db upgrade`")
        )


@click.group("kek")
def kek() -> None:
    """Key-encryption key (KEK) files and rotation."""


@kek.command("new")
@click.option(
    "--out",
    required=True,
    type=click.Path(dir_okay=False, path_type=Path),
    help="The file to write (never overwritten).",
)
def kek_new(out: Path) -> None:
    """Write a new random KEK file, readable by its owner only."""
    try:
        write_new_kek(out)
    except FileExistsError:
        raise CommandError(f"{out} exists; a KEK file is never overwritten") from None
    click.echo(f"wrote {out} (mode 0600); keep a copy in your key custody procedure")


@kek.command("rotate")
@config_option
@click.option(
    "--new-kek",
    required=True,
    type=click.Path(dir_okay=False, path_type=Path),
    help="The new KEK file (make it with `keystrata kek new`).",
)
@click.option(
    "--batch", type=click.IntRange(1), default=500, show_default=True,
    help="Rows per transaction.",
)  # fmt: skip
def kek_rotate(config_path: Path, new_kek: Path, batch: int) -> None:
    """Re-seal every row under a new KEK. Run with the node stopped; resumable.

    When it finishes, point [kek] file in the node's config at the new KEK file.
    """
    with handled(), progress.bar("re-sealing rows") as bar:
        settings = settings_from(config_path)
        done = [0]

        def count(rows_of_this_table: int) -> None:
            # The rotation counts rows per table, from 0 for each table.
            if rows_of_this_table < done[0]:
                done[0] = 0
            bar.advance(rows_of_this_table - done[0])
            done[0] = rows_of_this_table

        report = kek_rotation.rotate(
            _db(settings),
            settings.node.id,
            read_kek(settings.kek.file),
            read_kek(new_kek),
            batch=batch,
            progress=count,
        )
        click.echo(
            f"re-sealed {report.resealed_blocks} link key blocks, "
            f"{report.resealed_segments} pair key segments and keys, {report.resealed_meta} "
            f"node secrets ({report.already_done} were already done). Now set "
            f'[kek] file = "{new_kek}" in {config_path}.'
        )
