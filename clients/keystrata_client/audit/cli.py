"""``keystrata-ledger-check``: verify a ledger export offline and say what is wrong.

The export is checked against the auditor's state folder (``--state``, else
``$KEYSTRATA_AUDIT_STATE``, else the per-user folder of
:func:`keystrata_client.audit.state.default_state_dir`): the node's pinned key and the
last checkpoint seen. Only this module and the ``keystrata audit`` commands read the
environment.

Exit status: 0 when the export verifies, 1 when something is wrong (the report names
the first bad entry when it can; a key other than the pinned one, a truncated or forked
log, times going backwards), 2 when the command cannot run (missing folder or files, an
unreadable key, earlier checkpoint or state file, a bad option).
"""

from __future__ import annotations

import base64
import binascii
import json
import os
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar

import click
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey
from cryptography.hazmat.primitives.serialization import (
    Encoding,
    PublicFormat,
    load_pem_public_key,
)

from keystrata_client.audit.state import STATE_ENV, StateError, default_state_dir, verify_with_state
from keystrata_client.audit.verify import Report

F = TypeVar("F", bound=Callable[..., Any])


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


def read_public_key(value: str) -> bytes:
    """``--public-key``: see :func:`_public_key` (exit status 2 when unreadable)."""
    return _public_key(value)


def state_options(command: F) -> F:
    """Add ``--state DIR`` (or ``$KEYSTRATA_AUDIT_STATE``) and ``--trust-new-key``."""
    command = click.option(
        "--trust-new-key",
        is_flag=True,
        help="Accept an export signed with another key than the one pinned for its node, "
        "and pin that key instead (compare it out of band first).",
    )(command)
    return click.option(
        "--state",
        type=click.Path(file_okay=False, path_type=Path),
        envvar=STATE_ENV,
        show_envvar=True,
        help="The auditor's state folder: per node, the pinned ledger key and the last "
        "checkpoint seen [default: $XDG_STATE_HOME/keystrata/audit or "
        "~/.local/state/keystrata/audit].",
    )(command)


def state_folder(value: Path | None) -> Path:
    """The state folder given, or the per-user default (read from the environment)."""
    return value if value is not None else default_state_dir(os.environ)


def checked(
    folder: Path,
    state: Path | None,
    *,
    public_key: bytes | None = None,
    trust_new_key: bool = False,
    earlier: list[dict[str, Any]] | None = None,
    check_index: int | None = None,
) -> Report:
    """Verify ``folder`` against the state folder; a state that cannot be used is a
    usage problem (exit status 2)."""
    try:
        return verify_with_state(
            folder,
            state_folder(state),
            public_key=public_key,
            trust_new_key=trust_new_key,
            earlier=earlier or [],
            check_index=check_index,
        )
    except StateError as exc:
        raise _CannotRun(str(exc)) from exc


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
            f"signed at      {report.signed_at or '(no signing time)'}",
            f"public key     {report.public_key}"
            + (f"  ({report.pinning})" if report.pinning else ""),
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
    "bytes, or a file holding that, the raw bytes or a PEM public key. Overrides the key "
    "pinned in the state folder and, when the export verifies, replaces it.",
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
@state_options
def main(
    directory: Path,
    public_key: str | None,
    earlier: tuple[Path, ...],
    entry: int | None,
    as_json: bool,
    state: Path | None,
    trust_new_key: bool,
) -> None:
    """Verify the ledger export in DIRECTORY without the network: every entry, the
    signed checkpoint, earlier checkpoints, the node's pinned key and the last checkpoint
    seen of it (state folder), and optionally one entry's inclusion."""
    try:
        pinned = None if public_key is None else _public_key(public_key)
        saved = _earlier(earlier)
        report = checked(directory, state, public_key=pinned, trust_new_key=trust_new_key,
                         earlier=saved, check_index=entry)  # fmt: skip
    except (OSError, ValueError) as exc:  # a missing or unreadable file, a bad --entry
        raise _CannotRun(str(exc)) from exc
    click.echo(json.dumps(report.to_json(), indent=2) if as_json else render(report, directory))
    raise SystemExit(0 if report.ok else 1)
