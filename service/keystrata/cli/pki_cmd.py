"""``keystrata pki``: create the network's CA, issue node and client certificates, and
revoke certificates (a CRL signed by the CA, ``crl.pem`` in the PKI folder).

A thin layer over :mod:`keystrata.crypto.pki`: it parses options, calls one function and
prints what was written. Errors of the service become :class:`CommandError`, so
the user sees one line and exit status 1, never a traceback or file content.
"""

from __future__ import annotations

import contextlib
import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import click
from cryptography import x509
from cryptography.hazmat.primitives import hashes
from cryptography.x509.oid import ExtendedKeyUsageOID

from keystrata.cli.common import CommandError
from keystrata.crypto import revocation
from keystrata.crypto.certificates import NODE_MARKER, fingerprint_sha256, load_certificate
from keystrata.crypto.pki import CLIENT_ROLES, PkiDir, WrittenFiles
from keystrata.errors import KeystrataError

DEFAULT_CA_NAME = "Example Network CA"
# Loopback by default: a certificate without the node's real name fails TLS loudly, so
# forgetting --host cannot produce a certificate that works somewhere unintended.
DEFAULT_HOSTS = ("localhost", "127.0.0.1")
_SAN_KINDS: dict[type[x509.GeneralName], str] = {
    x509.DNSName: "DNS",
    x509.IPAddress: "IP",
    x509.UniformResourceIdentifier: "URI",
}
_EKU_NAMES = {
    ExtendedKeyUsageOID.SERVER_AUTH: "serverAuth",
    ExtendedKeyUsageOID.CLIENT_AUTH: "clientAuth",
    NODE_MARKER: "keystrata node marker",
}

_dir_option = click.option(
    "--dir",
    "directory",
    required=True,
    type=click.Path(file_okay=False, path_type=Path),
    help="PKI folder holding ca.crt and ca.key.",
)
_force_option = click.option(
    "--force", is_flag=True, help="Replace existing files of the same name."
)


@click.group("pki")
def pki() -> None:
    """Create the network's CA and issue node and client certificates.

    Private keys are written unencrypted (PKCS #8 PEM) with mode 0600: protect the
    folder, and keep the CA key offline once certificates are issued.
    """


@pki.command("init")
@_dir_option
@click.option("--name", default=DEFAULT_CA_NAME, show_default=True, help="CA common name.")
@click.option(
    "--force",
    is_flag=True,
    help="Replace an existing CA; certificates it issued will no longer verify.",
)
def init_cmd(directory: Path, name: str, force: bool) -> None:
    """Create the CA: writes ca.crt and ca.key into DIR."""
    with _errors():
        written = PkiDir(directory).init(name, force=force)
        fingerprint = fingerprint_sha256(written.cert.read_bytes())
    _echo_written(written)
    click.echo(f"CA SHA-256 fingerprint: {fingerprint}")


@pki.command("issue-node")
@_dir_option
@click.option("--node-id", required=True, help="Node ID; the certificate's CN and file name.")
@click.option(
    "--host",
    "hosts",
    multiple=True,
    default=DEFAULT_HOSTS,
    show_default=True,
    help="Host name or IP address the node answers on (repeat for several).",
)
@_force_option
def issue_node_cmd(directory: Path, node_id: str, hosts: tuple[str, ...], force: bool) -> None:
    """Issue a node certificate.

    The certificate serves TLS and calls peers; writes NODE_ID.crt and NODE_ID.key.
    """
    with _errors():
        written = PkiDir(directory).issue_node(node_id, list(hosts), force=force)
    _echo_written(written)


@pki.command("issue-client")
@_dir_option
@click.option("--name", required=True, help="Common name of the caller; also the file name.")
@click.option("--role", required=True, help=f"One of: {', '.join(CLIENT_ROLES)}.")
@_force_option
def issue_client_cmd(directory: Path, name: str, role: str, force: bool) -> None:
    """Issue a client certificate for a role; writes NAME.crt and NAME.key."""
    # The role is checked by the service layer (not click.Choice) so the CLI and the
    # library give the same answer and the list of roles lives in one place.
    with _errors():
        written = PkiDir(directory).issue_client(name, role, force=force)
    _echo_written(written)


_days_option = click.option(
    "--next-update-days",
    default=revocation.DEFAULT_NEXT_UPDATE_DAYS,
    show_default=True,
    help="Days until the CRL's next update; nodes refuse every client after it.",
)


@pki.command("revoke")
@_dir_option
@click.option(
    "--cert",
    "cert_file",
    type=click.Path(exists=True, dir_okay=False, path_type=Path),
    help="The certificate to revoke.",
)
@click.option("--serial", help="Or its serial number, hex (as `pki show` prints it).")
@click.option(
    "--reason",
    default="unspecified",
    show_default=True,
    help=f"One of: {', '.join(revocation.REASONS)}.",
)
@_days_option
def revoke_cmd(
    directory: Path,
    cert_file: Path | None,
    serial: str | None,
    reason: str,
    next_update_days: int,
) -> None:
    """Revoke a certificate: add it to the CA's CRL and write DIR/crl.pem anew.

    Nodes with [tls] crl pointing at a copy of crl.pem refuse it from their next
    handshake on, without a restart.
    """
    with _errors():
        number: int | None = None
        if serial is not None:
            try:
                number = int(serial.replace(":", ""), 16)
            except ValueError:
                raise click.BadParameter("a hexadecimal serial", param_hint="--serial") from None
        written = revocation.revoke(
            PkiDir(directory),
            cert=cert_file.read_bytes() if cert_file else None,
            serial=number,
            reason=reason,
            next_update_days=next_update_days,
        )
    if not written.added:
        click.echo("that certificate was revoked already; its entry is kept")
    _echo_crl(written)


@pki.command("crl")
@_dir_option
@_days_option
def crl_cmd(directory: Path, next_update_days: int) -> None:
    """Issue the CRL again with the same entries (new number and next update).

    Run it before the next update passes (cron, a systemd timer) and copy crl.pem to
    the nodes.
    """
    with _errors():
        written = revocation.refresh(PkiDir(directory), next_update_days=next_update_days)
    _echo_crl(written)


def _echo_crl(written: revocation.CrlWritten) -> None:
    click.echo(
        f"wrote {written.path} (CRL number {written.number}, {written.revoked} revoked, "
        f"next update {written.next_update.isoformat()})"
    )


@pki.command("show")
@click.argument("file", type=click.Path(exists=True, dir_okay=False, path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="Print JSON for scripts.")
def show_cmd(file: Path, as_json: bool) -> None:
    """Print a certificate's main fields.

    Subject, issuer, serial, validity, SAN, EKU and SHA-256 fingerprint of FILE.
    """
    with _errors():
        summary = describe_certificate(file.read_bytes())
    if as_json:
        click.echo(json.dumps(summary, indent=2))
        return
    width = max(len(k) for k in summary) + 1
    for key, value in summary.items():
        text = ", ".join(value) if isinstance(value, list) else value
        click.echo(f"{key + ':':<{width}} {text or '-'}")


def describe_certificate(data: bytes) -> dict[str, Any]:
    """Return the fields people check on a certificate, as JSON-ready values.

    The serial is hex: up to 159 bits does not fit a JSON number that readers parse
    exactly. Raises InvalidInput for anything that is not a certificate.
    """
    cert = load_certificate(data)
    san: list[str] = []
    with contextlib.suppress(x509.ExtensionNotFound):
        for entry in cert.extensions.get_extension_for_class(x509.SubjectAlternativeName).value:
            san.append(f"{_SAN_KINDS.get(type(entry), type(entry).__name__)}:{entry.value}")
    eku: list[str] = []
    with contextlib.suppress(x509.ExtensionNotFound):
        usages = cert.extensions.get_extension_for_class(x509.ExtendedKeyUsage).value
        eku = [_EKU_NAMES.get(oid, oid.dotted_string) for oid in usages]
    return {
        "subject": cert.subject.rfc4514_string(),
        "issuer": cert.issuer.rfc4514_string(),
        "serial": f"{cert.serial_number:x}",
        "not_before": cert.not_valid_before_utc.isoformat(),
        "not_after": cert.not_valid_after_utc.isoformat(),
        "subject_alt_names": san,
        "extended_key_usage": eku,
        "sha256_fingerprint": cert.fingerprint(hashes.SHA256()).hex(),
    }


def _echo_written(written: WrittenFiles) -> None:
    click.echo(f"wrote {written.cert} (certificate)")
    click.echo(f"wrote {written.key} (private key, mode 0600, unencrypted)")


@contextlib.contextmanager
def _errors() -> Iterator[None]:
    """Turn service and file-system errors into one-line click errors (exit status 1)."""
    try:
        yield
    except KeystrataError as exc:
        raise CommandError(exc.message) from exc
    except OSError as exc:
        # strerror and the path only: an OSError never carries file content.
        where = f"{exc.filename}: " if exc.filename else ""
        raise CommandError(f"{where}{exc.strerror or 'input/output error'}") from exc
