"""``keystrata-ledger-check``: verify a ledger export offline and say what is wrong.

Exit status: 0 when the export verifies, 1 when something is wrong (the report names
the first bad entry when it can), 2 when the command cannot run (missing folder or
files, an unreadable key or earlier checkpoint, a bad option).
"""

from __future__ import annotations

import base64
import binascii
import json
from pathlib import Path
from typing import Any

import click
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey
from cryptography.hazmat.primitives.serialization import (
    Encoding,
    PublicFormat,
    load_pem_public_key,
)

from keystrata_client.audit.verify import Report, verify_export


class _CannotRun(click.ClickException):
    """A usage problem found after parsing (exit status 2, like click's own)."""

    exit_code = 2


def _public_key(value: str) -> bytes:
    """Read a raw Ed25519 public key: Base64 of 32 bytes, or a file holding that, the
    32 raw bytes, or a PEM ``PUBLIC KEY``."""
    path = Path(value)
    data = path.read_bytes() if path.is_file() else value.encode()
    if data.lstrip().startswith(b"-----BEGIN"):
        try:
            key = load_pem_public_key(data)
        except ValueError as exc:
            raise _CannotRun(f"--public-key: {value}: not a PEM public key") from exc
        if not isinstance(key, Ed25519PublicKey):
            raise _CannotRun(f"--public-key: {value}: not an Ed25519 key")
        return key.public_bytes(Encoding.Raw, PublicFormat.Raw)
    if len(data) == 32 and path.is_file():
        return data
    try:
        raw = base64.b64decode(data.strip(), validate=True)
    except (binascii.Error, ValueError):
        raw = b""
    if len(raw) != 32:
        raise _CannotRun("--public-key: give the Base64 of a 32-byte Ed25519 key, or a file")
    return raw


def _earlier(paths: tuple[Path, ...]) -> list[dict[str, Any]]:
    """Read checkpoints kept from earlier exports: a checkpoint.json, or JSON lines."""
    found: list[dict[str, Any]] = []
    for path in paths:
        text = path.read_text(encoding="utf-8", errors="replace")
        try:
            values = [json.loads(text)]
        except ValueError:
            try:
                values = [json.loads(line) for line in text.splitlines() if line.strip()]
            except ValueError as exc:
                raise _CannotRun(f"--earlier: {path}: not JSON") from exc
        if not values or not all(isinstance(v, dict) for v in values):
            raise _CannotRun(f"--earlier: {path}: holds no checkpoint objects")
        found += values
    return found


def render(report: Report, folder: Path) -> str:
    """Return the report as a few lines of plain text for people."""
    lines = [f"ledger export  {folder}"]
    if report.origin is not None:
        lines += [
            f"origin         {report.origin}",
            f"tree size      {report.tree_size}",
            f"root           {report.root}",
            f"public key     {report.public_key}",
        ]
    lines.append(f"entries        {report.entries} passed")
    lines += [f"  {count:>9}  {event}" for event, count in report.events.items()]
    if report.ok:
        lines.append("result         VERIFIED")
    else:
        first = "" if report.first_bad is None else f": first bad entry {report.first_bad}"
        lines.append(f"result         FAILED{first}")
        lines += [f"  - {finding}" for finding in report.findings]
    if report.notes:
        lines.append("notes")
        lines += [f"  - {note}" for note in report.notes]
    return "\n".join(lines)


@click.command(context_settings={"help_option_names": ["-h", "--help"]})
@click.argument("directory", type=click.Path(exists=True, file_okay=False, path_type=Path))
@click.option(
    "--public-key",
    metavar="B64_OR_FILE",
    help="The node's Ed25519 public key, obtained out of band: Base64 of the raw 32 "
    "bytes, or a file holding that, the raw bytes or a PEM public key.",
)
@click.option(
    "--earlier",
    multiple=True,
    type=click.Path(exists=True, dir_okay=False, path_type=Path),
    help="A checkpoint.json kept from an earlier export (or a file of checkpoints, one "
    "JSON object per line); it must be a prefix of this export. Repeatable.",
)
@click.option(
    "--entry", type=click.IntRange(min=0), help="Also check this entry's inclusion proof."
)
@click.option("--json", "as_json", is_flag=True, help="Print the report as JSON.")
def main(
    directory: Path,
    public_key: str | None,
    earlier: tuple[Path, ...],
    entry: int | None,
    as_json: bool,
) -> None:
    """Verify the ledger export in DIRECTORY without the network: every entry, the
    signed checkpoint, earlier checkpoints, and optionally one entry's inclusion."""
    try:
        pinned = None if public_key is None else _public_key(public_key)
        saved = _earlier(earlier)
        report = verify_export(directory, public_key=pinned, earlier=saved, check_index=entry)
    except (OSError, ValueError) as exc:  # a missing or unreadable file, a bad --entry
        raise _CannotRun(str(exc)) from exc
    click.echo(json.dumps(report.to_json(), indent=2) if as_json else render(report, directory))
    raise SystemExit(0 if report.ok else 1)
