"""Key-encryption-key files: one line of Base64 (RFC 4648) holding 32 random bytes,
readable by the owner only."""

from __future__ import annotations

import base64
import binascii
import os
import stat
from pathlib import Path

from keystrata.crypto.hazmat import KEK_BYTES, random_bytes
from keystrata.errors import StartupRefused


def write_new_kek(path: Path) -> None:
    """Create a new KEK file with mode 0600. Refuses to overwrite an existing file.

    Raises:
        FileExistsError: ``path`` already exists.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "w") as fh:
        fh.write(base64.b64encode(random_bytes(KEK_BYTES)).decode() + "\n")


def read_kek(path: Path) -> bytes:
    """Read a KEK file after checking that only its owner can read it.

    Raises:
        StartupRefused: missing file, group/other permissions, another owner, or content
            that is not 32 bytes of Base64. The message names the file and the fix.
    """
    try:
        st = path.stat()
    except FileNotFoundError as exc:
        raise StartupRefused(
            f"key-encryption-key file {path} does not exist; create one with "
            f"`keystrata kek new --out {path}`"
        ) from exc
    if stat.S_IMODE(st.st_mode) & 0o077:
        raise StartupRefused(
            f"key-encryption-key file {path} is readable by group or others "
            f"(mode {stat.S_IMODE(st.st_mode):04o}); run `chmod 600 {path}`"
        )
    if st.st_uid != os.geteuid():
        raise StartupRefused(
            f"key-encryption-key file {path} belongs to another user; it must be owned by "
            "the user the node runs as"
        )
    try:
        kek = base64.b64decode(path.read_text().strip(), validate=True)
    except (binascii.Error, ValueError) as exc:
        raise StartupRefused(f"key-encryption-key file {path} is not Base64") from exc
    if len(kek) != KEK_BYTES:
        raise StartupRefused(f"key-encryption-key file {path} must hold exactly 32 bytes")
    return kek
