"""Files of the PKI folder written in place: a crash leaves the old file or the new one,
and a private key is never readable by others, not for an instant.

Used for certificates and keys (:class:`keystrata.crypto.pki.PkiDir`) and for the CRL
(:mod:`keystrata.crypto.revocation`).
"""

from __future__ import annotations

import contextlib
import os
import secrets
from pathlib import Path


def write_atomic(path: Path, data: bytes, *, secret: bool) -> None:
    """Write ``data`` to a new temporary file beside ``path``, then rename it into place."""
    tmp = path.with_name(f".{path.name}.{secrets.token_hex(8)}.tmp")
    # O_EXCL with a fresh name: a planted file or symlink makes the open fail instead of
    # being followed. A key is created with mode 0600 from its first instant, so it is
    # never readable by others, not even between open and write.
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW | os.O_CLOEXEC
    fd = os.open(tmp, flags, 0o600 if secret else 0o644)
    try:
        if not secret:
            # Certificates are public; set their mode on the empty file so umask does not decide.
            os.fchmod(fd, 0o644)
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
