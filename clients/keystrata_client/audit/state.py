"""The auditor's state: per node, the pinned ledger key and the last checkpoint seen.

An auditor who verifies exports now and then must notice what no single export shows: a
node (or whoever hands over its export) that signs with another key, drops the entries
after a point and ships its own older checkpoint, or shows a history of the same size
with another root. So the audit tools keep a small folder, one file per origin (node
ID), ``<origin>.json``::

    {"format": 1, "origin": ..., "public_key": Base64, "pinned_at": RFC 3339,
     "checkpoint": {the six keys of checkpoint.json, plus "signed_at" when it has one},
     "seen_at": RFC 3339}

:func:`verify_with_state` verifies an export against it: the key pinned on first use
(trust on first use: the report prints it, for comparing out of band), or the one given;
the last checkpoint seen, which the export must extend (:func:`verify_export`'s
``last_seen``). Only a verified export updates the file. Another key is refused unless
the caller says ``trust_new_key``, which re-pins the export's key and says so.

The folder is made owner-only (0700), each file is written to a temporary file and
renamed (0600), and a lock file serialises runs that share the folder. The default
location follows the XDG base directory rules: ``$XDG_STATE_HOME/keystrata/audit``, else
``~/.local/state/keystrata/audit``; only the command-line tools read the environment.
"""

from __future__ import annotations

import base64
import fcntl
import json
import os
import re
import stat
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Final

from keystrata_client.audit._checkpoint import BadCheckpoint, Checkpoint, b64_value, stamp
from keystrata_client.audit.export import CHECKPOINT_FILE, CHECKPOINT_KEYS, _atomic
from keystrata_client.audit.verify import Report, verify_export

#: The environment variable the command-line tools read for the state folder.
STATE_ENV: Final = "KEYSTRATA_AUDIT_STATE"
STATE_FORMAT: Final = 1
#: Origins the state keeps files for: node IDs (the server's identifier rule).
_ORIGIN = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}")


class StateError(Exception):
    """The state folder cannot be used: not ours, unreadable, or a file is damaged."""


def default_state_dir(environ: Mapping[str, str]) -> Path:
    """The per-user state folder under the XDG base directory rules (a relative
    ``XDG_STATE_HOME`` is ignored, as the rules say)."""
    xdg = environ.get("XDG_STATE_HOME", "")
    home = Path(environ["HOME"]) if environ.get("HOME") else Path.home()
    base = Path(xdg) if xdg and Path(xdg).is_absolute() else home / ".local" / "state"
    return base / "keystrata" / "audit"


def _private_folder(folder: Path) -> None:
    """Create ``folder`` owner-only, or make an existing one of ours owner-only."""
    try:
        folder.mkdir(mode=0o700, parents=True, exist_ok=True)
        info = folder.stat()
        if not stat.S_ISDIR(info.st_mode):
            raise StateError(f"{folder}: not a directory")
        if info.st_uid != os.getuid():
            raise StateError(f"{folder}: belongs to another user; give a folder of your own")
        if stat.S_IMODE(info.st_mode) != 0o700:
            folder.chmod(0o700)
    except OSError as exc:
        raise StateError(f"{folder}: cannot use it as the state folder ({exc.strerror})") from exc


@contextmanager
def _locked(folder: Path) -> Iterator[None]:
    fd = os.open(folder / ".lock", os.O_RDWR | os.O_CREAT, 0o600)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)  # closing releases the lock


def _load(path: Path, origin: str) -> tuple[bytes, dict[str, Any]] | None:
    """The pinned key and last checkpoint of ``origin``, or None when none is kept."""
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        return None
    except OSError as exc:
        raise StateError(f"{path}: cannot read it ({exc.strerror})") from exc
    try:
        record = json.loads(data)
    except ValueError:
        record = None
    key = b64_value(record.get("public_key"), 32) if isinstance(record, dict) else None
    if (
        not isinstance(record, dict)
        or record.get("format") != STATE_FORMAT
        or record.get("origin") != origin
        or key is None
        or not isinstance(record.get("checkpoint"), dict)
    ):
        raise StateError(
            f"{path}: damaged or of another format; move it away only if you know why "
            "(it holds the node's pinned key)"
        )
    return key, record


def _pinned_at(record: Mapping[str, Any] | None, key: bytes, old: bytes | None) -> str:
    if record is not None and old == key and isinstance(record.get("pinned_at"), str):
        return str(record["pinned_at"])
    return stamp(datetime.now(UTC))


def verify_with_state(
    directory: str | os.PathLike[str],
    state_dir: str | os.PathLike[str],
    *,
    public_key: bytes | None = None,
    trust_new_key: bool = False,
    earlier: Sequence[Mapping[str, Any]] = (),
    check_index: int | None = None,
    now: datetime | None = None,
) -> Report:
    """Verify an export against the state kept for its origin, and update that state
    when it verifies.

    Args:
        directory: an export folder (:func:`write_export`).
        state_dir: the state folder (created owner-only when missing).
        public_key: a key given explicitly; it overrides (and replaces) the pinned key.
        trust_new_key: accept an export signed with another key than the pinned one and
            pin the export's key instead.
        earlier, check_index, now: as :func:`verify_export`.

    Returns:
        The :class:`Report`, with ``pinning`` set and notes saying what was pinned.

    Raises:
        StateError: the state folder cannot be used or a state file is damaged.
        FileNotFoundError, ValueError: as :func:`verify_export`.
    """
    folder, state = Path(directory), Path(state_dir)
    try:
        latest = Checkpoint.read(json.loads((folder / CHECKPOINT_FILE).read_bytes()), "")
    except (OSError, ValueError):  # BadCheckpoint too: the plain verifier says what is wrong
        return verify_export(folder, public_key=public_key, earlier=earlier,
                             check_index=check_index, now=now)  # fmt: skip
    if not _ORIGIN.fullmatch(latest.origin):
        report = Report(origin=None)
        report.findings.append(
            f"{CHECKPOINT_FILE}: its origin is not a node ID, so no state is kept for it"
        )
        return report
    _private_folder(state)
    path = state / f"{latest.origin}.json"
    with _locked(state):
        kept = _load(path, latest.origin)
        old, record = kept if kept is not None else (None, None)
        if public_key is not None:
            key, pinning = public_key, "given"
        elif old is not None and trust_new_key and old != latest.key:
            key, pinning = latest.key, "re-pinned"
        elif old is not None:
            key, pinning = old, "pinned"
        else:
            key, pinning = None, "first-use"
        last_seen = None if record is None else record["checkpoint"]
        report = verify_export(folder, public_key=key, earlier=earlier,
                               check_index=check_index, last_seen=last_seen, now=now)  # fmt: skip
        report.pinning = pinning
        if not report.ok:
            if old is not None and key == old and old != latest.key:
                report.findings.append(
                    f"the export is signed with {report.public_key}, not the key pinned in "
                    f"{path}: if the node's ledger key really changed (compare it out of "
                    "band), pass --trust-new-key"
                )
            return report
        _save(path, latest, json.loads((folder / CHECKPOINT_FILE).read_bytes()), record, old)
    report.notes += _pinning_notes(pinning, report, path, old)
    return report


def _save(
    path: Path,
    latest: Checkpoint,
    value: Mapping[str, Any],
    record: Mapping[str, Any] | None,
    old: bytes | None,
) -> None:
    """Pin the key the export verified under and keep its checkpoint (write and rename)."""
    checkpoint = {k: value[k] for k in CHECKPOINT_KEYS}
    if latest.signed_at is not None:
        checkpoint["signed_at"] = stamp(latest.signed_at)
    new = {
        "format": STATE_FORMAT,
        "origin": latest.origin,
        "public_key": value["public_key"],
        "pinned_at": _pinned_at(record, latest.key, old),
        "checkpoint": checkpoint,
        "seen_at": stamp(datetime.now(UTC)),
    }
    try:
        with _atomic(path) as out:
            out.write(json.dumps(new, indent=2) + "\n")
    except OSError as exc:
        raise StateError(f"{path}: cannot write it ({exc.strerror})") from exc


def _pinning_notes(pinning: str, report: Report, path: Path, old: bytes | None) -> list[str]:
    key = report.public_key
    if pinning == "first-use":
        return [
            f"first export of {report.origin} seen: its ledger key {key} is now pinned in "
            f"{path}; compare it with the node's key obtained out of band"
        ]
    if pinning == "re-pinned":
        was = "" if old is None else f" (was {b64(old)})"
        return [f"ledger key of {report.origin} re-pinned to {key}{was} (--trust-new-key)"]
    if pinning == "given" and old is not None and b64(old) != key:
        return [f"ledger key of {report.origin} pinned to the key given, {key} (was {b64(old)})"]
    return [f"ledger key of {report.origin} as pinned in {path}: {key}"]


def b64(raw: bytes) -> str:
    return base64.b64encode(raw).decode()


__all__ = [
    "STATE_ENV",
    "BadCheckpoint",
    "StateError",
    "default_state_dir",
    "verify_with_state",
]
