"""Checkpoints as an export carries them, read and checked against their signed text.

The signed text is the body of a C2SP tlog checkpoint (origin, tree size, Base64 root hash,
each on its own line) and, from format version 2 on, one extension line of ours::

    <origin>\\n<tree size>\\n<base64 root hash>\\nkeystrata/v2 signed-at <time>\\n

where ``<time>`` is RFC 3339 (section 5.6) in UTC with ``Z`` and up to six fraction
digits, e.g. ``2026-12-02T10:49:00.000000Z``. Version 1 (no fourth line) is read as a
checkpoint with no signing time. Any other fourth line, or more lines, is refused.

Signing times must not lie in the future beyond :data:`MAX_CLOCK_SKEW`, and never go
backwards as tree sizes grow; once a node signs times, it keeps signing them.
"""

from __future__ import annotations

import base64
import binascii
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from itertools import groupby
from typing import Any, Final

#: The extension line's marker (format version 2); version 1 has no extension line.
TIME_LINE_MARKER: Final = "keystrata/v2 signed-at"
#: How far ahead of the verifying computer's clock a signing time may be.
MAX_CLOCK_SKEW: Final = timedelta(minutes=5)

_TIME = re.compile(r"(\d{4})-(\d{2})-(\d{2})T(\d{2}):(\d{2}):(\d{2})(?:\.(\d{1,6}))?Z")
_ANY_VERSION = re.compile(r"keystrata/v\d+ .*")


def b64_value(value: Any, size: int | None = None) -> bytes | None:
    """Decode canonical Base64 (RFC 4648 section 4, padded, no stray bits) of ``size``
    bytes; return None when ``value`` is anything else."""
    if not isinstance(value, str):
        return None
    try:
        raw = base64.b64decode(value, validate=True)
    except (binascii.Error, ValueError):
        return None
    if base64.b64encode(raw).decode() != value or (size is not None and len(raw) != size):
        return None
    return raw


def stamp(at: datetime) -> str:
    """``at`` as the signed text writes it (RFC 3339, UTC, microseconds, ``Z``)."""
    return at.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def parse_time(text: str) -> datetime | None:
    """Return the UTC time ``text`` names in the signed text's form, or None."""
    found = _TIME.fullmatch(text)
    if found is None:
        return None
    year, month, day, hour, minute, second = (int(g) for g in found.groups()[:6])
    micro = int((found.group(7) or "0").ljust(6, "0"))
    try:
        return datetime(year, month, day, hour, minute, second, micro, tzinfo=UTC)
    except ValueError:  # month 13, second 60 (a leap second is not a time Python holds)
        return None


class BadCheckpoint(ValueError):
    """A checkpoint in an export is malformed or its signed text disagrees with it."""


@dataclass(frozen=True, slots=True)
class Checkpoint:
    """A checkpoint read from an export, its signed text checked against its fields (its
    signature is not checked here). ``where`` names the file it came from;
    ``signed_at`` is None for a version 1 checkpoint (no time in its signed text)."""

    where: str
    origin: str
    tree_size: int
    root: bytes
    text: str
    signature: bytes
    key: bytes
    signed_at: datetime | None = None

    @classmethod
    def read(cls, value: Any, where: str) -> Checkpoint:
        """Return the checkpoint in the JSON value ``value``.

        Raises:
            BadCheckpoint: a key is missing or malformed, or ``signed_text`` is not
                ``f"{origin}\\n{tree_size}\\n{root_hash}\\n"`` followed by nothing
                (version 1) or by one well-formed time line (version 2).
        """
        if not isinstance(value, Mapping):
            raise BadCheckpoint(f"{where}: not a JSON object")
        origin, size, text = value.get("origin"), value.get("tree_size"), value.get("signed_text")
        if not isinstance(origin, str) or not origin or "\n" in origin:
            raise BadCheckpoint(f"{where}: origin is not a one-line string")
        if type(size) is not int or size < 0:
            raise BadCheckpoint(f"{where}: tree_size is not a size")
        root = b64_value(value.get("root_hash"), 32)
        signature = b64_value(value.get("signature"), 64)
        key = b64_value(value.get("public_key"), 32)
        if root is None or signature is None or key is None:
            raise BadCheckpoint(
                f"{where}: root_hash, signature or public_key is not Base64 of 32, 64, 32 bytes"
            )
        head = f"{origin}\n{size}\n{value['root_hash']}\n"
        if not isinstance(text, str) or not text.startswith(head):
            raise BadCheckpoint(f"{where}: signed_text does not match origin, tree_size, root_hash")
        return cls(
            where, origin, size, root, text, signature, key, _time_line(text[len(head) :], where)
        )


def _time_line(rest: str, where: str) -> datetime | None:
    """The signing time in what follows the first three lines (None: version 1)."""
    if not rest:
        return None
    line, end, more = rest.partition("\n")
    if not end or more:
        raise BadCheckpoint(f"{where}: signed_text has lines this verifier does not know")
    marker, _, value = line.rpartition(" ")
    if marker != TIME_LINE_MARKER:
        what = "format version" if _ANY_VERSION.fullmatch(line) else "extension line"
        raise BadCheckpoint(f"{where}: signed_text has an unknown {what}")
    at = parse_time(value)
    if at is None:
        raise BadCheckpoint(f"{where}: the signing time is not an RFC 3339 UTC time")
    return at


def time_findings(
    checkpoints: Iterable[Checkpoint], now: datetime, skew: timedelta = MAX_CLOCK_SKEW
) -> list[str]:
    """Return what is wrong with the signing times of ``checkpoints`` (all of one node):
    a time beyond ``now + skew``, a time before that of a smaller tree, or no time after
    a smaller tree had one."""
    found: list[str] = []
    ordered = sorted(checkpoints, key=lambda c: c.tree_size)
    for cp in ordered:
        if cp.signed_at is not None and cp.signed_at > now + skew:
            found.append(
                f"{cp.where}: signed at {stamp(cp.signed_at)}, in the future (more than "
                f"{int(skew.total_seconds())} s ahead of this computer's clock)"
            )
    before: tuple[Checkpoint, datetime] | None = None  # latest time of a smaller tree
    for _, same_size in groupby(ordered, key=lambda c: c.tree_size):
        group = list(same_size)
        for cp in group:
            if before is None:
                break
            first, then = before
            if cp.signed_at is None:
                found.append(
                    f"{cp.where}: signs {cp.tree_size} entries without a signing time, after "
                    f"{first.where} signed one for {first.tree_size} entries (the format "
                    "never goes back)"
                )
            elif cp.signed_at < then:
                found.append(
                    f"{cp.where}: signs {cp.tree_size} entries at {stamp(cp.signed_at)}, before "
                    f"{first.where} signed {first.tree_size} entries at {stamp(then)}: "
                    "checkpoint times go backwards"
                )
        for cp in group:
            if cp.signed_at is not None and (before is None or cp.signed_at > before[1]):
                before = (cp, cp.signed_at)
    return found
