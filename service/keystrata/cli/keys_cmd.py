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
from keystrata.cli.connection import client_errors, connection_options
from keystrata.cli.units import Units
from keystrata_client import TlsIdentity
from keystrata_client.keys import KeyClient, KeyContainer, KeyStatus, RequestForm

__all__ = ["keys"]

SHOW_KEY_WARNING = (
    "warning: --show-key prints key material. Whatever appears on a terminal stays in "
    "its scrollback, screen recordings and session logs: treat these keys as exposed "
    "and do not protect anything with them."
)


#: Key delivery's refusals are all 401 (ETSI GS QKD 014; the ledger tells them apart).
SAE_HINTS = {
    401: "keys are delivered by the SAE's own station, to an SAE registered there and "
    "allowed in the pair, once per key ID: check --url names that station, and the SAE "
    "IDs (the station's ledger records why: `keystrata audit search --event key.refused`)",
}


def open_client(url: str, ca: Path, cert: Path, key: Path) -> KeyClient:
    """Return a client for the node at ``url`` that presents the SAE's certificate.

    Raises:
        CommandError: the URL or a TLS file is unusable (one sentence and a hint).
    """
    with client_errors():
        return KeyClient(url, TlsIdentity(ca=ca, cert=cert, key=key))


@contextmanager
def sae(url: str, ca: Path, cert: Path, key: Path) -> Iterator[KeyClient]:
    """Yield a client; SDK errors shown as one sentence and a hint, exit status 1."""
    client = open_client(url, ca, cert, key)
    try:
        with client_errors(SAE_HINTS):
            yield client
    finally:
        client.close()


#: The Get status answer's fields (ETSI GS QKD 014 names, in --json) in words.
STATUS_LINES = (
    ("source_KME_ID", "source KME"),
    ("target_KME_ID", "target KME"),
    ("master_SAE_ID", "master SAE"),
    ("slave_SAE_ID", "slave SAE"),
    ("key_size", "default key size"),
    ("stored_key_count", "keys ready"),
    ("max_key_count", "most keys stored"),
    ("max_key_per_request", "most keys per request"),
    ("min_key_size", "smallest key size"),
    ("max_key_size", "largest key size"),
    ("max_SAE_ID_count", "most additional slaves"),
)


def _status_table(status: KeyStatus, units: Units) -> Table:
    table = Table(title=f"key status, {status.master_sae_id} -> {status.slave_sae_id}")
    table.add_column("")
    table.add_column("", justify="right")
    table.add_column("ETSI GS QKD 014 field", style="dim")
    answer = status.to_json()
    for name, label in STATUS_LINES:
        value = answer.get(name)
        if isinstance(value, int):
            # A key size is a parameter, always exact; counts with separators.
            text = f"{value:,} bit" if name.endswith("key_size") else units.count(value)
        else:
            text = str(value)
        table.add_row(label, text, name)
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
    click.echo(f"{'key ID':<36}  {'size':>10}  SHA-256")
    for row in rows:
        click.echo(f"{row['key_ID']:<36}  {row['size']:>6} bit  {row['sha256']}")
    if show_key:
        click.echo("")
        for row in rows:
            click.echo(f"{row['key_ID']}  {row['key']}")


form_opt = click.option(
    "--form",
    type=click.Choice(["post", "get"]),
    default="post",
    show_default=True,
    help="The standard's POST form (JSON body) or GET form (query string).",
)
show_key_opt = click.option(
    "--show-key",
    is_flag=True,
    help="Also print the keys in Base64 (exposes them; a warning goes to stderr).",
)


@click.group("keys")
def keys() -> None:
    """ETSI GS QKD 014 key delivery, as the SAE whose certificate you present."""


@keys.command("status")
@click.argument("slave_sae_id")
@connection_options
def status_cmd(
    slave_sae_id: str, url: str, ca: Path, cert: Path, key: Path, as_json: bool, exact: bool
) -> None:
    """Show what the node can give for keys shared with SLAVE_SAE_ID (Get status)."""
    with sae(url, ca, cert, key) as client:
        status = client.status(slave_sae_id)
    if as_json:
        print_json(status.to_json())
    else:
        console.print(_status_table(status, Units(exact)))


@keys.command("get")
@click.argument("slave_sae_id")
@click.option(
    "--number", type=click.IntRange(min=1), default=1, show_default=True, help="Keys to get."
)
@click.option(
    "--size",
    type=click.IntRange(min=8),
    default=None,
    help="Bits per key, a multiple of 8 [default: the pair's default key size].",
)
@click.option(
    "--also",
    "also",
    multiple=True,
    metavar="SAE_ID",
    help="Another slave SAE that may fetch the same keys (repeatable).",
)
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
    exact: bool,
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
    exact: bool,
) -> None:
    """Get the keys MASTER_SAE_ID obtained under KEY_ID... (Get key with key IDs, dec_keys).

    The node serves each key once: without --show-key the keys are used up and only
    their SHA-256 digests are shown (compare them with the master's).
    """
    with sae(url, ca, cert, key) as client:
        container = client.get_keys_with_ids(master_sae_id, key_ids, form=form)
    _show_keys(container, as_json, show_key)
