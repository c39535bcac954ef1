"""``keystrata keys``: the ETSI GS QKD 014 calls of an SAE, to try a station by hand.

The commands speak as the SAE whose certificate they present. For people they print key
IDs, sizes and SHA-256 digests; the keys themselves only with ``--show-key``, which
also warns on stderr that a key shown on a terminal is exposed.
"""

from __future__ import annotations

import base64
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import click
from rich.table import Table

from keystrata.cli.common import console, print_json
from keystrata.cli.remote_cmd import connection_options
from keystrata_client import ApiError, KeystrataClientError, TlsIdentity
from keystrata_client.keys import KeyClient, KeyContainer, KeyStatus, RequestForm

__all__ = ["keys"]

SHOW_KEY_WARNING = (
    "warning: --show-key prints key material. Whatever appears on a terminal stays in "
    "its scrollback, screen recordings and session logs: treat these keys as exposed "
    "and do not protect anything with them."
)


def open_client(url: str, ca: Path, cert: Path, key: Path) -> KeyClient:
    """Return a client for the node at ``url`` that presents the SAE's certificate.

    Raises:
        click.ClickException: the URL or a TLS file is unusable.
    """
    try:
        return KeyClient(url, TlsIdentity(ca=ca, cert=cert, key=key))
    except ValueError as exc:
        raise click.BadParameter(str(exc), param_hint="--url") from None
    except OSError as exc:  # ssl.SSLError is an OSError
        raise click.ClickException(f"cannot use the TLS files: {exc}") from None


@contextmanager
def sae(url: str, ca: Path, cert: Path, key: Path) -> Iterator[KeyClient]:
    """Yield a client; turn SDK errors into a message and exit code 1."""
    client = open_client(url, ca, cert, key)
    try:
        yield client
    except ApiError as exc:
        detail = "".join(f"\n  - {d}" for d in exc.details[:20])
        raise click.ClickException(f"{exc.status}: {exc.message}{detail}") from None
    except KeystrataClientError as exc:
        raise click.ClickException(str(exc)) from None
    except ValueError as exc:
        # The SDK checks arguments before sending anything.
        raise click.UsageError(str(exc)) from None
    finally:
        client.close()


def _status_table(status: KeyStatus) -> Table:
    table = Table(title=f"key status, {status.master_sae_id} -> {status.slave_sae_id}")
    table.add_column("field")
    table.add_column("value", justify="right")
    for name, value in status.to_json().items():
        if name != "status_extension":
            table.add_row(name, f"{value:,}" if isinstance(value, int) else str(value))
    return table


def _show_keys(container: KeyContainer, as_json: bool, show_key: bool) -> None:
    if show_key:
        click.echo(SHOW_KEY_WARNING, err=True)
    rows: list[dict[str, Any]] = []
    for k in container:
        row: dict[str, Any] = {"key_ID": k.key_id, "size": k.size, "sha256": k.digest()}
        if show_key:
            row["key"] = base64.b64encode(k.key).decode("ascii")
        rows.append(row)
    if as_json:
        print_json({"keys": rows})
        return
    # Plain lines, not a table: a digest must never be wrapped or cut on a narrow terminal.
    click.echo(f"{'key_ID':<36}  {'size':>6}  sha256")
    for row in rows:
        click.echo(f"{row['key_ID']:<36}  {row['size']:>6}  {row['sha256']}")
    if show_key:
        click.echo("")
        for row in rows:
            click.echo(f"{row['key_ID']}  {row['key']}")


form_opt = click.option(
    "--form",
    type=click.Choice(["post", "get"]),
    default="post",
    show_default=True,
    help="the standard's POST form (JSON body) or GET form (query string)",
)
show_key_opt = click.option(
    "--show-key",
    is_flag=True,
    help="also print the keys in Base64 (exposes them; a warning goes to stderr)",
)


@click.group("keys")
def keys() -> None:
    """ETSI GS QKD 014 key delivery, as the SAE whose certificate you present."""


@keys.command("status")
@click.argument("slave_sae_id")
@connection_options
def status_cmd(slave_sae_id: str, url: str, ca: Path, cert: Path, key: Path, as_json: bool) -> None:
    """Show what the node can give for keys shared with SLAVE_SAE_ID (Get status)."""
    with sae(url, ca, cert, key) as client:
        status = client.status(slave_sae_id)
    if as_json:
        print_json(status.to_json())
    else:
        console.print(_status_table(status))


@keys.command("get")
@click.argument("slave_sae_id")
@click.option("--number", type=click.IntRange(min=1), default=1, show_default=True)
@click.option("--size", type=click.IntRange(min=8), default=None, help="bits, a multiple of 8")
@click.option("--also", "also", multiple=True, metavar="SAE_ID", help="another slave SAE")
@form_opt
@show_key_opt
@connection_options
def get_cmd(
    slave_sae_id: str,
    number: int,
    size: int | None,
    also: tuple[str, ...],
    form: RequestForm,
    show_key: bool,
    url: str,
    ca: Path,
    cert: Path,
    key: Path,
    as_json: bool,
) -> None:
    """Get new keys shared with SLAVE_SAE_ID (Get key, enc_keys).

    Prints each key's ID, size and SHA-256; pass the IDs to the slave SAE. A request
    whose answer is lost is not sent again (the node may have allocated the keys).
    """
    with sae(url, ca, cert, key) as client:
        container = client.get_keys(slave_sae_id, number, size, also, form=form)
    _show_keys(container, as_json, show_key)


@keys.command("get-by-id")
@click.argument("master_sae_id")
@click.argument("key_ids", nargs=-1, required=True, metavar="KEY_ID...")
@form_opt
@show_key_opt
@connection_options
def get_by_id_cmd(
    master_sae_id: str,
    key_ids: tuple[str, ...],
    form: RequestForm,
    show_key: bool,
    url: str,
    ca: Path,
    cert: Path,
    key: Path,
    as_json: bool,
) -> None:
    """Get the keys MASTER_SAE_ID obtained under KEY_ID... (Get key with key IDs, dec_keys).

    The node serves each key once: without --show-key the keys are used up and only
    their SHA-256 digests are shown (compare them with the master's).
    """
    with sae(url, ca, cert, key) as client:
        container = client.get_keys_with_ids(master_sae_id, key_ids, form=form)
    _show_keys(container, as_json, show_key)
